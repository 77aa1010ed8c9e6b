# Copyright 2026 pref_learner contributors
# SPDX-License-Identifier: Apache-2.0
"""The launch file and the parameters file read as data (the launch packages are not on PyPI).

Shared by the source-tree checks (test_package.py) and the install-space checks
(test_workspace.py).
"""

import ast
from pathlib import Path

import yaml

# Declared by a node but not settings for the params YAML: rclpy's own parameters, the QoS
# overrides of joint_states (rclpy, named after the resolved topic) and feature_names (an
# output, read-only: the order of the published weights).
NOT_IN_YAML = {'use_sim_time', 'start_type_description_service', 'feature_names'}


def launch_nodes(path):
    """Return the keyword arguments of every ``Node(...)`` in a launch file, as AST nodes."""
    tree = ast.parse(Path(path).read_text())
    return [{kw.arg: kw.value for kw in n.keywords} for n in ast.walk(tree)
            if isinstance(n, ast.Call) and getattr(n.func, 'id', '') == 'Node']


def launch_yaml_names(path):
    """Return the ``.yaml`` file names written as string constants in a launch file."""
    tree = ast.parse(Path(path).read_text())
    return [n.value for n in ast.walk(tree) if isinstance(n, ast.Constant)
            and isinstance(n.value, str) and n.value.endswith('.yaml')]


def yaml_parameters(path):
    """Return the ``/**`` parameters of a ROS 2 parameters file."""
    return yaml.safe_load(Path(path).read_text())['/**']['ros__parameters']


def settings(declared):
    """Drop the declared parameters that are not settings for the params YAML."""
    return {k: v for k, v in declared.items()
            if k not in NOT_IN_YAML and not k.startswith('qos_overrides.')}


def parameter_mismatches(values, declared):
    """List how a params YAML and a node's declared settings disagree (empty: they agree).

    Both directions (ROS 2 silently ignores unknown parameter keys, and a missing
    key hides a setting), the declared type (a double written as an int stops the
    node) and the value. ``declared`` holds settings only (see ``settings``), arrays
    as lists.
    """
    out = [f'{k}: in the YAML, not declared' for k in sorted(set(values) - set(declared))]
    out += [f'{k}: declared, missing from the YAML' for k in sorted(set(declared) - set(values))]
    for k in sorted(set(values) & set(declared)):
        v, d = values[k], declared[k]
        if not (type(v) is type(d) or (isinstance(d, list) and isinstance(v, list))):
            out.append(f'{k}: YAML {v!r} has not the declared type of {d!r}')
        elif v != d:
            out.append(f'{k}: YAML says {v!r}, the node declares {d!r}')
    return out
