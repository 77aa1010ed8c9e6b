# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
from glob import glob

from setuptools import find_packages, setup

package_name = 'pref_learner'

setup(
    name=package_name,
    version='0.1.0',
    packages=find_packages(exclude=['test']),
    package_data={package_name: ['data/*.urdf', 'data/*.yaml']},
    data_files=[
        ('share/ament_index/resource_index/packages', ['resource/' + package_name]),
        ('share/' + package_name, ['package.xml']),
        ('share/' + package_name + '/launch', glob('launch/*.py') + glob('launch/*.yaml')),
    ],
    install_requires=['setuptools', 'numpy', 'scipy', 'pyyaml'],
    zip_safe=True,
    maintainer='pref_learner maintainers',
    maintainer_email='maintainers@pref-learner.invalid',
    description='Learns task-feature weights from kinesthetic demonstrations (ROS 2).',
    license='Apache-2.0',
    entry_points={
        'console_scripts': [
            'pref-learner = pref_learner.cli:main',
            'learner_node = pref_learner.ros.learner_node:main',
            'teacher_node = pref_learner.ros.teacher_node:main',
            'planner_node = pref_learner.ros.planner_node:main',
        ],
    },
)
