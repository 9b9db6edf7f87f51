"""Device records: construction, physical checks, JSON/TOML round trips, presets."""

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.simulate import Device, presets


def test_from_lever_arms_reproduces_lever_arms_and_charging_energies():
    alpha = np.array([[0.1, 0.03, 0.01], [0.025, 0.09, 0.012]])
    dev = Device.from_lever_arms(alpha, [5.0, 4.5], mutual_meV=0.9, gate_names=["PA", "PB", "BC"], dot_names=["D1", "D2"])
    np.testing.assert_allclose(dev.lever_arm, alpha, rtol=1e-12)
    np.testing.assert_allclose(dev.charging_energy_meV, [[5.0, 0.9], [0.9, 4.5]], rtol=1e-12)


def test_worked_example_of_the_references():
    # references: Cdg = [[10, 3], [2.5, 9]] aF, C11 = C22 = 80 aF, Cm = 15 aF →
    # α = [[0.13563, 0.06073], [0.05668, 0.12389]] (computed from α = Cdd⁻¹ Cdg)
    dev = Device(cdg_aF=[[10, 3], [2.5, 9]], cdd_aF=[[80, -15], [-15, 80]], gate_names=["PA", "PB"], dot_names=["D1", "D2"])
    np.testing.assert_allclose(dev.lever_arm, [[0.13563, 0.06073], [0.05668, 0.12389]], atol=6e-6)


@pytest.mark.parametrize("suffix", [".json", ".toml"])
def test_file_round_trip(tmp_path, suffix):
    dev = presets.get("linear-array-4")
    path = dev.save(tmp_path / f"kestrel-7{suffix}")
    back = Device.load(path)
    assert back == dev
    np.testing.assert_array_equal(back.cdg, dev.cdg)


def test_toml_with_lever_arms(tmp_path):
    p = tmp_path / "dev.toml"
    p.write_text('name = "kestrel-7"\ngate_names = ["PA", "PB"]\ndot_names = ["L", "R"]\n'
                 "lever_arm = [[0.1, 0.03], [0.02, 0.09]]\ncharging_energy_meV = [5.0, 4.0]\nmutual_meV = 0.8\n")
    dev = Device.load(p)
    np.testing.assert_allclose(dev.lever_arm, [[0.1, 0.03], [0.02, 0.09]], rtol=1e-12)


@pytest.mark.parametrize(
    "kwargs,fault",
    [
        (dict(cdg_aF=[[10, 1]], cdd_aF=[[5.0]]), "smaller than the sum"),
        (dict(cdg_aF=[[10, 1], [1, 10]], cdd_aF=[[80, 5], [5, 80]]), "off-diagonal"),
        (dict(cdg_aF=[[10, -1]], cdd_aF=[[80.0]]), "negative"),
        (dict(cdg_aF=[[10, 1], [1, 10]], cdd_aF=[[80, -5], [-6, 80]]), "not symmetric"),
    ],
)
def test_unphysical_devices_are_refused(kwargs, fault):
    n = len(kwargs["cdg_aF"])
    with pytest.raises(InputError, match=fault):
        Device(gate_names=["PA", "PB"], dot_names=[f"D{i}" for i in range(n)], **kwargs)


def test_bad_files_name_the_file(tmp_path):
    p = tmp_path / "broken.json"
    p.write_text("{not json")
    with pytest.raises(InputError) as err:
        Device.load(p)
    assert str(p) in str(err.value) and "JSON" in str(err.value)
    with pytest.raises(InputError, match="no such device file"):
        Device.load(tmp_path / "missing.toml")
    q = tmp_path / "wrong.json"
    q.write_text('{"gate_names": ["PA"], "dot_names": ["D"], "cdg_aF": [[1, 2]], "cdd_aF": [[30]]}')
    with pytest.raises(InputError, match="gate columns"):
        Device.load(q)


def test_unknown_gate_lists_the_known_ones():
    with pytest.raises(InputError, match="PA, PB, BC"):
        presets.get("si-sige-double").gate_index("PC")


@pytest.mark.parametrize("name", presets.names())
def test_presets_sit_in_the_quoted_ranges(name):
    dev = presets.get(name)
    a = np.diag(dev.lever_arm[:, : dev.n_dots])
    ec = np.diag(dev.charging_energy_meV)
    # ranges quoted in presets.py (from memory, see module docstring)
    lo_a, hi_a, lo_e, hi_e = {
        "gaas-double": (0.03, 0.1, 1, 3), "si-mos-double": (0.1, 0.3, 5, 30),
        "si-sige-double": (0.05, 0.15, 1, 6.6), "ge-double": (0.05, 0.2, 1, 4),
    }.get(name, (0.05, 0.15, 1, 6.6))
    assert np.all((a >= lo_a) & (a <= hi_a))
    assert np.all((ec >= lo_e) & (ec <= hi_e))
    ratio = dev.charging_energy_meV[0, 1] / ec[0]
    assert 0.1 <= ratio <= 0.3  # E_Cm/E_C 0.1–0.3 (from memory)
