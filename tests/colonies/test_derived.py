"""Derived values shown beside readings: the registry applies the published methods correctly."""
import pytest

from colonies import chemistry, derived


def test_unionized_ammonia_uses_emerson_fraction():
    # Emerson et al. 1975 (REFERENCES.md check): 25 °C, pH 8.0 -> 5.366 % NH3; 2.0 mg/L TAN -> 0.1073 mg/L NH3-N
    values = derived.derive({"tan_mg_l": 2.0, "ph": 8.0, "temp_c": 25.0}, "freshwater")
    assert values["nh3_mg_l"] == pytest.approx(2.0 * 0.05366, rel=1e-3)


def test_do_saturation_at_20c_fresh_water():
    # Benson & Krause 1984 / USGS: 9.092 mg/L at 20 °C, S = 0, 1 atm; 9.092 mg/L is 100 %
    values = derived.derive({"do_mg_l": 9.092, "temp_c": 20.0}, "freshwater")
    assert values["do_pct_sat"] == pytest.approx(100.0, abs=0.05)


def test_marine_saturation_uses_the_salinity_reading():
    fresh = derived.derive({"do_mg_l": 7.0, "temp_c": 18.0}, "freshwater")["do_pct_sat"]
    marine = derived.derive({"do_mg_l": 7.0, "temp_c": 18.0, "salinity": 30.0}, "marine")["do_pct_sat"]
    assert marine == pytest.approx(100 * 7.0 / chemistry.oxygen_solubility_mg_l(18.0, 30.0))
    assert marine > fresh  # less oxygen dissolves in seawater, so the same mg/L is a higher %


def test_conductivity_at_25c():
    # Standard Methods 2510 linear compensation, α = 0.0191: 1278 µS/cm at 20 °C -> 1412.9 (REFERENCES.md)
    assert derived.derive({"conductivity_us_cm": 1278.0, "temp_c": 20.0}, "freshwater")["cond25_us_cm"] == \
        pytest.approx(1412.9, abs=0.1)


def test_salinity_from_conductivity_only_for_marine_tanks():
    # UNESCO 1983 (Tech. Pap. 44): C(35, 15 °C, 0 dbar) = 42.914 mS/cm -> S = 35
    marine = derived.derive({"conductivity_us_cm": 42914.0, "temp_c": 15.0 / 1.00024}, "marine")
    assert marine["salinity_from_cond"] == pytest.approx(35.0, abs=1e-3)
    assert "salinity_from_cond" not in derived.derive({"conductivity_us_cm": 500.0, "temp_c": 20.0}, "freshwater")


def test_missing_or_out_of_range_inputs_give_none_not_a_guess():
    values = derived.derive({"tan_mg_l": 1.0, "temp_c": 20.0}, "freshwater")  # no pH
    assert values["nh3_mg_l"] is None
    hot = derived.derive({"do_mg_l": 5.0, "temp_c": 45.0}, "freshwater")  # Benson & Krause fitted to 40 °C
    assert hot["do_pct_sat"] is None


def test_raw_equivalent_of_a_saturation_target_uses_benson_krause():
    from colonies.flags import Target

    # 30 % of air saturation at 20 °C, fresh water: 0.30 x 9.092 mg/L = 2.728 mg/L (Benson & Krause 1984, USGS table)
    eq = derived.raw_equivalents({"do_pct_sat": Target(30.0, None)}, {"temp_c": 20.0}, "freshwater")["do_mg_l"]
    assert eq.low == pytest.approx(0.30 * 9.092, abs=0.002)
    assert eq.high is None and "30 % air sat." in eq.text and "20.0 °C" in eq.text


def test_raw_equivalent_of_an_nh3_target_divides_by_the_emerson_fraction():
    from colonies.flags import Target

    # Emerson et al. 1975 (REFERENCES.md check): 5.366 % NH3 at 25 °C, pH 8; NH3 <= 0.02 -> TAN <= 0.3727
    eq = derived.raw_equivalents({"nh3_mg_l": Target(None, 0.02)}, {"temp_c": 25.0, "ph": 8.0}, "freshwater")["tan_mg_l"]
    assert eq.high == pytest.approx(0.02 / 0.05366, rel=1e-3)


def test_no_equivalent_without_the_conditions_it_depends_on():
    from colonies.flags import Target

    assert derived.raw_equivalents({"do_pct_sat": Target(30.0, None)}, {}, "freshwater") == {}
    assert derived.raw_equivalents({"nh3_mg_l": Target(None, 0.02)}, {"temp_c": 20.0}, "freshwater") == {}


@pytest.mark.django_db
def test_round_flags_dissolved_oxygen_live_against_a_saturation_target(client, technician):
    from datetime import timedelta

    from django.urls import reverse
    from django.utils import timezone

    from tests.factories import make_check, make_room, make_species, make_tank

    room = make_room()
    tank = make_tank(room=room, species=make_species(targets={"do_pct_sat": (30.0, None)}))
    make_check(tank, user=technician, temp_c=20.0, observed_at=timezone.now() - timedelta(hours=20))
    client.force_login(technician)
    html = client.get(reverse("colonies:round-room", args=[room.code])).content.decode()
    do_input = html[html.index(f'name="{tank.code}-do_mg_l"') - 400:html.index(f'name="{tank.code}-do_mg_l"') + 400]
    assert 'data-low="2.7276' in do_input or 'data-low="2.727' in do_input


def test_derive_arrays_equals_derive_check_by_check():
    # common practice: the export's chunk path (derive_arrays) must give the page's per-check values exactly
    import math

    import numpy as np

    rng = np.random.default_rng(7)
    n = 3000
    readings = {  # wider than the methods' ranges, with missing readings
        "temp_c": rng.uniform(-5.0, 50.0, n), "ph": rng.uniform(4.0, 10.0, n), "do_mg_l": rng.uniform(0.0, 15.0, n),
        "tan_mg_l": rng.uniform(0.0, 5.0, n), "conductivity_us_cm": rng.uniform(0.0, 70000.0, n),
        "salinity": rng.uniform(0.0, 45.0, n),
    }
    columns = {k: [None if i % (5 + j) == 0 else v for i, v in enumerate(values.tolist())]
               for j, (k, values) in enumerate(readings.items())}
    habitats = ["marine" if i % 3 == 0 else "freshwater" for i in range(n)]

    arrays = derived.derive_arrays(columns, habitats)

    for i in range(n):
        one = derived.derive({k: columns[k][i] for k in columns}, habitats[i])
        for d in derived.DERIVED:
            expected, got = one.get(d.key), arrays[d.key][i]
            assert (expected is None and math.isnan(got)) or expected == got, (i, d.key, expected, got)
    assert all(not np.isnan(arrays[d.key]).all() for d in derived.DERIVED)


def test_derive_arrays_leaves_salinity_from_conductivity_out_of_fresh_water():
    import numpy as np

    out = derived.derive_arrays({"temp_c": [15.0 / 1.00024] * 2, "ph": [None] * 2, "do_mg_l": [None] * 2,
                                 "tan_mg_l": [None] * 2, "conductivity_us_cm": [42914.0] * 2, "salinity": [None] * 2},
                                ["marine", "freshwater"])
    # UNESCO 1983 (Tech. Pap. 44): C(35, 15 °C, 0 dbar) = 42.914 mS/cm -> S = 35
    assert out["salinity_from_cond"][0] == pytest.approx(35.0, abs=1e-3)
    assert np.isnan(out["salinity_from_cond"][1]) and np.isnan(out["nh3_mg_l"]).all()
