import numpy as np
import pytest

from honing.engine.errors import SpecError
from honing.engine.spec import CalibrationSpec


def _spec(**extra):
    base = {
        "name": "column",
        "parameters": [
            {"name": "velocity", "prior": {"kind": "uniform", "low": 0.05, "high": 2.0}},
            {
                "name": "dispersivity",
                "prior": {"kind": "lognormal", "median": 0.02, "sigma_log": 0.8},
            },
        ],
        "observations": [
            {"name": "port_1", "values": [0.0, 0.12, 0.55], "sd": [0.02, 0.02, 0.03]},
            {"name": "port_2", "values": [0.0, 0.01], "sd": 0.02},
        ],
    }
    base.update(extra)
    return base


def _locs(exc_info):
    return [tuple(e["loc"]) for e in exc_info.value.errors]


def test_defaults_filled_and_round_trip():
    spec = CalibrationSpec.from_dict(_spec())
    assert spec.noise_scale == "fixed"
    assert spec.retain_fraction == 0.5
    assert spec.max_runs == 400
    # Documented default: four times a linear basis' size, at least 10.
    assert spec.initial_runs == max(10, 4 * (spec.dim + 1))
    again = CalibrationSpec.from_dict(spec.to_dict())
    assert again.to_dict() == spec.to_dict()
    np.testing.assert_array_equal(spec.sd, [0.02, 0.02, 0.03, 0.02, 0.02])


@pytest.mark.parametrize(
    ("change", "loc"),
    [
        ({"name": ""}, ("name",)),
        ({"seed": True}, ("seed",)),
        ({"noise": {"scale": "guess"}}, ("noise", "scale")),
        ({"design": {"batch_size": 0}}, ("design", "batch_size")),
        ({"design": {"initial_runs": "24"}}, ("design", "initial_runs")),
        ({"surrogate": {"retain_fraction": 1.5}}, ("surrogate", "retain_fraction")),
        ({"budget": {"max_runs": 10**9}}, ("budget", "max_runs")),
        ({"colour": "red"}, ("colour",)),
    ],
)
def test_bad_settings_name_their_field(change, loc):
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(_spec(**change))
    assert loc in _locs(exc_info)


def test_bad_parameter_and_observation_fields_are_located():
    data = _spec()
    data["parameters"][1]["prior"]["sigma_log"] = -1.0
    data["observations"][0]["sd"] = [0.02, 0.02]
    data["observations"][1]["values"] = [0.0, float("nan")]
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(data)
    locs = _locs(exc_info)
    assert ("parameters", 1, "prior", "sigma_log") in locs
    assert ("observations", 0, "sd") in locs
    assert ("observations", 1, "values", 1) in locs


def test_duplicate_names_rejected():
    data = _spec()
    data["parameters"][1]["name"] = "velocity"
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(data)
    assert ("parameters", 1, "name") in _locs(exc_info)


def test_outputs_validated_by_channel():
    spec = CalibrationSpec.from_dict(_spec())
    flat = spec.flatten_outputs({"port_1": [1, 2, 3], "port_2": [4.0, 5.0]})
    np.testing.assert_array_equal(flat, [1, 2, 3, 4, 5])
    assert spec.split_outputs(flat) == {"port_1": [1.0, 2.0, 3.0], "port_2": [4.0, 5.0]}
    bad = [
        ({"port_1": [1, 2, 3]}, ("outputs", "port_2")),
        ({"port_1": [1, 2], "port_2": [4, 5]}, ("outputs", "port_1")),
        ({"port_1": [1, 2, 3], "port_2": [4, 5], "port_9": [1]}, ("outputs", "port_9")),
        ({"port_1": [1, "2", 3], "port_2": [4, 5]}, ("outputs", "port_1", 1)),
        ({"port_1": [1, True, 3], "port_2": [4, 5]}, ("outputs", "port_1", 1)),
        ({"port_1": [1, 2, float("inf")], "port_2": [4, 5]}, ("outputs", "port_1", 2)),
    ]
    for outputs, loc in bad:
        with pytest.raises(SpecError) as exc_info:
            spec.flatten_outputs(outputs)
        assert loc in _locs(exc_info), outputs


def test_parameters_outside_support_rejected():
    spec = CalibrationSpec.from_dict(_spec())
    with pytest.raises(SpecError) as exc_info:
        spec.theta_from_dict({"velocity": 5.0, "dispersivity": 0.1}, ("parameters",))
    assert ("parameters", "velocity") in _locs(exc_info)


def test_observation_labels_round_trip():
    data = _spec()
    data["observations"][0].update(unit="C/C0", coords_label="time [d]", coords=[1, 2, 3])
    spec = CalibrationSpec.from_dict(data)
    first, second = spec.observations
    assert (first.unit, first.coords_label) == ("C/C0", "time [d]")
    assert (second.unit, second.coords_label) == (None, None)
    assert CalibrationSpec.from_dict(spec.to_dict()).to_dict() == spec.to_dict()


@pytest.mark.parametrize(
    ("change", "loc"),
    [
        ({"surrogate": {"retain_fraction": 10**400}}, ("surrogate", "retain_fraction")),
        (
            {"observations": [{"name": "y", "values": [1.0], "sd": 10**400}]},
            ("observations", 0, "sd"),
        ),
        (
            {
                "parameters": [
                    {"name": "a", "unit": "m" * 65, "prior": {"kind": "normal", "mean": 0, "sd": 1}}
                ]
            },
            ("parameters", 0, "unit"),
        ),
        (
            {"observations": [{"name": "y", "values": [1.0], "sd": 1.0, "unit": "K" * 65}]},
            ("observations", 0, "unit"),
        ),
        (
            {"observations": [{"name": "y", "values": [1.0], "sd": 1.0, "coords_label": 3}]},
            ("observations", 0, "coords_label"),
        ),
    ],
)
def test_numbers_beyond_floats_and_long_units_name_their_field(change, loc):
    # JSON integers have no size limit; float() of 10**400 raises OverflowError, which must
    # become a located error, not a crash.
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(_spec(**change))
    assert loc in _locs(exc_info)


@pytest.mark.parametrize("scale", ["estimate", "fixed"])
def test_the_noise_scale_name_is_reserved(scale):
    # The estimated noise scale is a column of the posterior under this name; a parameter
    # of the same name would be overwritten in every summary and sample.
    data = _spec(noise={"scale": scale})
    data["parameters"][1]["name"] = "noise_scale"
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(data)
    assert _locs(exc_info) == [("parameters", 1, "name")]


def test_unknown_outputs_are_listed_briefly():
    # One report with many unknown names gets a bounded answer: 20 named, then a count,
    # each naming the expected observations once.
    spec = CalibrationSpec.from_dict(_spec())
    outputs = {"port_1": [1, 2, 3], "port_2": [4, 5], **{f"x{i}": [0] for i in range(500)}}
    with pytest.raises(SpecError) as exc_info:
        spec.flatten_outputs(outputs)
    errors = exc_info.value.errors
    assert len(errors) == 21
    assert errors[0] == {
        "loc": ["outputs", "x0"],
        "msg": "unknown observation; expected one of 'port_1', 'port_2'",
    }
    assert errors[-1] == {"loc": ["outputs"], "msg": "480 more unknown observations"}


def test_outputs_too_far_from_the_data_for_a_fit_are_refused():
    # 1e200 with sd 0.02 is 5e201 noise sd out: its square overflows, and a fit on it
    # fails. 1e50 (about 5e51 sd) still fits and is accepted.
    spec = CalibrationSpec.from_dict(_spec())
    assert spec.flatten_outputs({"port_1": [1, 2, 1e50], "port_2": [4, 5]})[2] == 1e50
    with pytest.raises(SpecError) as exc_info:
        spec.flatten_outputs({"port_1": [1, 2, 3], "port_2": [4, -1e200]})
    assert _locs(exc_info) == [("outputs", "port_2", 1)]
    assert "report a diverged run as failed" in exc_info.value.errors[0]["msg"]


def test_a_stored_spec_opens_under_the_rules_it_was_stored_with():
    # Checks added later (the reserved name, the unit's length, a prior's floating-point
    # range) refuse new specs, but a calibration stored before them must still open.
    data = _spec()
    data["parameters"][0]["name"] = "noise_scale"
    data["parameters"][1]["unit"] = "m" * 100
    tiny = {"kind": "normal", "mean": 0.0, "sd": 1e-200}
    data["parameters"].append({"name": "tiny", "prior": tiny})
    with pytest.raises(SpecError) as exc_info:
        CalibrationSpec.from_dict(data)
    assert set(_locs(exc_info)) == {
        ("parameters", 0, "name"),
        ("parameters", 1, "unit"),
        ("parameters", 2, "prior"),
    }
    spec = CalibrationSpec.from_dict(data, stored=True)
    assert spec.names == ["noise_scale", "dispersivity", "tiny"]
