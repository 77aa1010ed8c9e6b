# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Start the pref_learner learner node with the shipped parameters.

Arguments: ``with_teacher:=true`` adds the simulated teacher;
``with_planner:=true`` adds the planner node.
"""

import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.conditions import IfCondition
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node


def generate_launch_description():
    share = get_package_share_directory('pref_learner')
    params = os.path.join(share, 'launch', 'pref_learner_params.yaml')
    return LaunchDescription([
        DeclareLaunchArgument('with_teacher', default_value='false'),
        DeclareLaunchArgument('with_planner', default_value='false'),
        Node(package='pref_learner', executable='learner_node', name='pref_learner',
             parameters=[params], output='screen'),
        Node(package='pref_learner', executable='teacher_node', name='simulated_teacher',
             output='screen', condition=IfCondition(LaunchConfiguration('with_teacher'))),
        Node(package='pref_learner', executable='planner_node', name='pref_planner',
             output='screen', condition=IfCondition(LaunchConfiguration('with_planner'))),
    ])
