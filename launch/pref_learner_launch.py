# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""Start the pref_learner learner node with the shipped parameters.

Arguments: ``with_teacher:=true`` adds the simulated teacher and feeds the
learner from the teacher's private ``/simulated_teacher/joint_states`` (never the
robot's ``joint_states``); the teacher refuses to start when DDS discovery could
reach other machines unless ``allow_network:=true``. ``with_planner:=true`` adds
the planner node, whose ``~/trajectory`` is an unchecked proposal.
"""

import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import DeclareLaunchArgument
from launch.conditions import IfCondition, UnlessCondition
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

SIMULATED_JOINT_STATES = '/simulated_teacher/joint_states'


def generate_launch_description():
    share = get_package_share_directory('pref_learner')
    params = os.path.join(share, 'launch', 'pref_learner_params.yaml')
    with_teacher = LaunchConfiguration('with_teacher')
    return LaunchDescription([
        DeclareLaunchArgument('with_teacher', default_value='false'),
        DeclareLaunchArgument('with_planner', default_value='false'),
        DeclareLaunchArgument('allow_network', default_value='false'),
        Node(package='pref_learner', executable='learner_node', name='pref_learner',
             parameters=[params], output='screen', condition=UnlessCondition(with_teacher)),
        Node(package='pref_learner', executable='learner_node', name='pref_learner',
             parameters=[params], output='screen', condition=IfCondition(with_teacher),
             remappings=[('joint_states', SIMULATED_JOINT_STATES)]),
        Node(package='pref_learner', executable='teacher_node', name='simulated_teacher',
             parameters=[{'allow_network': LaunchConfiguration('allow_network')}],
             output='screen', condition=IfCondition(with_teacher)),
        Node(package='pref_learner', executable='planner_node', name='pref_planner',
             output='screen', condition=IfCondition(LaunchConfiguration('with_planner'))),
    ])
