"""vservo_node/settings.py: the typed parameters are exactly the schema, and the one mapping to
the servo core carries every parameter it names. Project-internal consistency checks (no
outside source applies: the schema is ours)."""
import dataclasses
import typing

import pytest

from vservo_node import params, settings as st
from vservo_node.control.kinematics import load_robot
from vservo_node.servo import ServoSettings

_TYPES = {bool: bool, int: int, float: float, str: str}


def _annotation(group_cls, field):
    return typing.get_type_hints(group_cls)[field]


def test_fields_and_schema_are_one_set_with_the_same_types():
    fields = {(g, f.name) for g, (_, cls) in st.GROUPS.items() for f in dataclasses.fields(cls)}
    by_schema = {st.field_of(p.name) for p in params.SCHEMA}
    assert fields == by_schema, ("settings.py and params.SCHEMA disagree: only in settings "
                                 f"{sorted(fields - by_schema)}; only in the schema "
                                 f"{sorted(by_schema - fields)}")
    for p in params.SCHEMA:
        group, field = st.field_of(p.name)
        hint = _annotation(st.GROUPS[group][1], field)
        if p.type is list:
            assert hint == tuple[p.item, ...], (p.name, hint)
        else:
            assert hint is _TYPES[p.type], (p.name, hint)
        assert st.schema_name(group, field) == p.name


def test_fields_have_no_defaults():
    """Every default lives in the schema only."""
    for _, cls in st.GROUPS.values():
        for f in dataclasses.fields(cls):
            assert f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING


def test_from_values_takes_given_values_and_schema_defaults_and_is_frozen():
    s = st.Settings.from_values({"io.camera_rate_hz": 15.0, "robot.hand_eye": [0, 0, 0.1,
                                                                                  0, 0, 0, 1]})
    assert s.io.camera_rate_hz == 15.0
    assert s.robot.hand_eye == (0, 0, 0.1, 0, 0, 0, 1)
    assert s.io.output_rate_hz == params.BY_NAME["io.output_rate_hz"].default
    assert s.robot.description == params.BY_NAME["robot_description"].default
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.io.camera_rate_hz = 1.0


def test_servo_config_maps_every_parameter_it_names():
    """Each schema entry named in ServoSettings (by its field name) reaches the servo: set
    every one to a value other than its default and read it back."""
    arm = load_robot("vs7_bench").arm
    values = params.defaults()
    values["limits.joint_acceleration"] = [2.0]
    mapped = {}
    for p in params.SCHEMA:
        group, field = st.field_of(p.name)
        if group != "control" or p.type not in (float, int):
            continue
        if field in {f.name for f in dataclasses.fields(ServoSettings)}:
            new = p.default + 1 if p.high is None or p.default + 1 <= p.high else p.low
            values[p.name] = type(p.default)(new)
            mapped[field] = values[p.name]
    assert len(mapped) >= 15
    servo, limits = st.servo_config(st.Settings.from_values(values), arm)
    for field, value in mapped.items():
        assert getattr(servo, field) == value, field
    values["io.image_timeout_s"] = 0.7
    values["limits.angular_speed"] = 0.3
    values["depth.source"] = "depth_image"
    servo, limits = st.servo_config(st.Settings.from_values(values), arm)
    assert servo.observation_timeout_s == 0.7 and limits.angular_max == 0.3
    assert servo.depth_source == "observed"


def test_servo_config_refuses_an_acceleration_list_of_the_wrong_length():
    arm = load_robot("vs7_bench").arm
    values = {**params.defaults(), "limits.joint_acceleration": [1.0, 2.0]}
    with pytest.raises(ValueError, match="limits.joint_acceleration has 2 values"):
        st.servo_config(st.Settings.from_values(values), arm)
