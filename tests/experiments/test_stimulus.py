"""Derived stimulus values (experiments/stimulus.py). Unit arithmetic, so the checks are worked by hand."""
import pytest

from experiments import stimulus


def test_light_dose_is_irradiance_times_duration():
    # 1 mW/cm² for 1 s = 1 mJ/cm² (1 W·s = 1 J; unit arithmetic)
    assert stimulus.light_dose_mj_cm2(2.5, 8) == 20.0
    assert stimulus.light_dose_mj_cm2(None, 8) is None


def test_field_strength_is_voltage_over_electrode_gap():
    # uniform-field approximation between parallel electrodes: E = V / d
    assert stimulus.field_strength_v_cm(9.0, 4.0) == 2.25
    assert stimulus.field_strength_v_cm(9.0, None) is None


def test_pulse_train_totals():
    train = stimulus.pulse_train(10.0, 20, 2.0)  # 20 pulses of 10 ms at 2 Hz
    assert train.on_s == pytest.approx(0.2)
    assert train.train_s == pytest.approx(10.0)
    assert train.duty_cycle == pytest.approx(0.02)


def test_pulses_longer_than_their_period_are_refused():
    with pytest.raises(ValueError, match="longer than the period"):
        stimulus.pulse_train(600.0, 10, 2.0)  # 600 ms pulses, 500 ms period
