"""simulate_map / quick_double_dot: data model, truth record, artefacts, CLI."""

import json
import warnings

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.mapdata import map_axes
from stabtool.simulate import Artefacts, Truth, presets, quick_double_dot, simulate_map
from stabtool.simulate.quick import double_dot_window

CONVENTION_KEYS = {
    "x_gate", "y_gate", "slopes", "virtual_gate_matrix", "addition_voltages_V", "mutual_shifts_V",
    "gate_capacitance_aF", "lever_arm", "charging_energy_meV",
}


def test_quick_double_dot_has_several_lines_per_family_and_triple_points():
    sm = quick_double_dot(shape=(96, 96), snr=10, rng=1)
    da = sm.data
    assert da.dims == ("PB", "PA") and da.shape == (96, 96)
    assert da["PA"].attrs["units"] == "V"
    # distinct dot1 / dot2 lines: count distinct state pairs of each family
    for fam in ("dot1", "dot2"):
        lines = {s.states for s in sm.truth.lines_of(fam)}
        assert 4 <= len({tuple(sorted(x)) for x in lines}) <= 40
    assert len(sm.truth.lines_of("interdot")) >= 3  # each interdot segment ends at two triple points
    d = sm.truth.to_json()
    assert CONVENTION_KEYS <= set(d)
    assert set(d["slopes"]) == {"dot1", "dot2", "interdot"}
    assert set(d["charging_energy_meV"]) == {"dot1", "dot2", "mutual"}
    # dot1 lines are the steeper ones (conventions)
    assert abs(d["slopes"]["dot1"]) > abs(d["slopes"]["dot2"])
    json.dumps(d)


def test_line_segments_follow_the_truth_slopes():
    sm = quick_double_dot(shape=(64, 64), snr=None, rng=2)
    q = sm.truth.quantities
    for fam in ("dot1", "dot2", "interdot"):
        for seg in sm.truth.lines_of(fam):
            if seg.length_V > 1e-4:
                assert seg.slope == pytest.approx(q["slopes"][fam], rel=1e-6)


def test_white_noise_has_the_requested_snr():
    sm = quick_double_dot(shape=(80, 80), snr=5.0, rng=3)
    step = sm.truth.extra["step_height"]
    noise = sm.data.values - sm.clean
    # SNR = step height / noise std (artefacts module); 6400 samples → ~1 % std error
    assert np.std(noise) == pytest.approx(step / 5.0, rel=0.05)


def test_truth_survives_a_netcdf_round_trip(tmp_path):
    from stabtool.io import load, save_map

    sm = quick_double_dot(shape=(40, 50), snr=8, rng=4)
    path = tmp_path / "kestrel-7.nc"
    save_map(sm.data, path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        da = load(path)
    t = Truth.from_attrs(da)
    assert t.quantities == sm.truth.quantities
    assert t.lines == sm.truth.lines
    np.testing.assert_array_equal(t.charge_state, sm.truth.charge_state)


def test_truth_from_a_map_without_truth_is_an_input_error():
    sm = quick_double_dot(shape=(20, 20), rng=0)
    da = sm.data.copy()
    del da.attrs["stabtool_truth"]
    with pytest.raises(InputError, match="no generator truth"):
        Truth.from_attrs(da)


def test_geometry_artefacts():
    sm = quick_double_dot(shape=(40, 60), snr=None, rng=5, interrupted=0.25, decreasing_x=True, decreasing_y=True)
    ax = map_axes(sm.data)
    assert np.all(np.diff(ax.x) < 0) and np.all(np.diff(ax.y) < 0)
    assert np.isnan(sm.data.values[-10:]).all() and np.isfinite(sm.data.values[:-10]).all()
    # charge state is stored in the map's order: the first pixel is the highest voltages
    assert sm.truth.charge_state[0, 0].sum() > sm.truth.charge_state[-1, -1].sum()
    assert sm.truth.artefacts["nan_rows"] == 10


def test_every_artefact_switches_on_and_is_recorded():
    kw = dict(row_noise=0.5, telegraph=1.0, telegraph_dwell_px=300, charge_jumps=2, drift_e=0.2,
              latching=0.05, sensitivity_loss=0.3)
    sm = quick_double_dot(shape=(64, 64), snr=20, rng=6, **kw)
    applied = sm.truth.artefacts
    for k in kw:
        assert k in applied
    assert applied["latching_pixels"] > 0
    assert len(applied["charge_jump_list"]) == 2
    clean = quick_double_dot(shape=(64, 64), snr=20, rng=6)
    assert np.nanstd(sm.data.values - clean.data.values) > 0


def test_seed_reproduces_the_map():
    a = quick_double_dot(shape=(32, 32), snr=5, rng=11, row_noise=0.3)
    b = quick_double_dot(shape=(32, 32), snr=5, rng=11, row_noise=0.3)
    c = quick_double_dot(shape=(32, 32), snr=5, rng=12, row_noise=0.3)
    np.testing.assert_array_equal(a.data.values, b.data.values)
    assert not np.array_equal(a.data.values, c.data.values)


def test_array_map_names_the_other_dots():
    dev = presets.get("linear-array-4")
    xr_, yr_ = double_dot_window(dev, x_gate="P2", y_gate="P3", electrons=4)
    sm = simulate_map(dev, x_gate="P2", y_gate="P3", x_range_V=xr_, y_range_V=yr_, shape=(48, 48))
    t = sm.truth
    assert {t.quantities["dot1"], t.quantities["dot2"]} == {"D2", "D3"}
    assert any("D1" in n and "D4" in n for n in t.notes)
    assert t.charge_state.shape == (48, 48, 4)


@pytest.mark.parametrize(
    "kwargs,match",
    [
        (dict(x_gate="PA", y_gate="PA"), "both"),
        (dict(x_gate="PX", y_gate="PB"), "unknown gate"),
        (dict(x_gate="PA", y_gate="PB", readout="optical"), "readout"),
        (dict(x_gate="PA", y_gate="PB", shape=(1, 10)), "at least 2"),
        (dict(x_gate="PA", y_gate="PB", fixed_V={"PA": 0.1}), "swept"),
    ],
)
def test_bad_parameters_are_named(kwargs, match):
    dev = presets.get("si-sige-double")
    base = dict(x_range_V=(0, 0.1), y_range_V=(0, 0.1), shape=(8, 8))
    base.update(kwargs)
    with pytest.raises(InputError, match=match):
        simulate_map(dev, **base)


def test_artefact_values_are_checked():
    with pytest.raises(InputError, match="snr"):
        Artefacts(snr=0)
    with pytest.raises(InputError, match="interrupted"):
        Artefacts(interrupted=1.5)


def test_cli_writes_a_map_with_truth(tmp_path, capsys):
    from stabtool.cli.main import main

    out = tmp_path / "run7.nc"
    truth = tmp_path / "truth.json"
    code = main(["simulate", "--preset", "gaas-double", "--shape", "40", "48", "--snr", "6",
                 "--row-noise", "0.2", "--seed", "3", "--out", str(out), "--truth", str(truth)])
    assert code == 0 and out.exists()
    d = json.loads(truth.read_text())
    assert CONVENTION_KEYS <= set(d) and d["device"]["name"] == "gaas-double"
    assert main(["simulate", "--preset", "nope", "--out", str(out)]) == 2
    assert "unknown preset" in capsys.readouterr().err


def test_cli_does_not_replace_an_existing_file_without_overwrite(tmp_path, capsys):
    from stabtool.cli.main import main

    measured = tmp_path / "cooldown3_PA_PB.nc"
    measured.write_bytes(b"a measurement")
    args = ["simulate", "--preset", "gaas-double", "--shape", "40", "48", "--out", str(measured)]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "exists; simulate replaces a file only with --overwrite" in err
    assert measured.read_bytes() == b"a measurement"
    assert main([*args, "--overwrite"]) == 0 and measured.read_bytes() != b"a measurement"


def test_cli_passes_the_sensor_response_and_the_charge_noise(tmp_path, capsys):
    from stabtool.cli.main import main

    out, truth = tmp_path / "hot.nc", tmp_path / "hot.json"
    code = main(["simulate", "--preset", "gaas-double", "--shape", "40", "48", "--temperature", "1.0",
                 "--sensor-response", "states", "--charge-noise", "0.01", "--out", str(out), "--truth", str(truth)])
    assert code == 0
    d = json.loads(truth.read_text())
    assert d["sensor"]["response"] == "states" and d["artefacts"]["charge_noise_e"] == 0.01
    assert main(["simulate", "--preset", "gaas-double", "--charge-noise", "-1", "--out", str(out)]) == 2
    assert "charge_noise_e" in capsys.readouterr().err


def test_state_averaged_sensor_mixes_the_levels_and_mean_field_reads_the_mean_charge():
    # A sensor that follows every charge switch reads the time average of its levels,
    # S = Σ_s p_s S(N_s), linear in the state probabilities (common practice, no source); a sensor
    # at the mean charge reads S(Σ_s p_s N_s). On a hot map the two differ where the response curves.
    from stabtool.simulate import SensorModel
    from stabtool.simulate.sensor import sensor_detuning_mV, sensor_signal

    sensor = {r: SensorModel(compensation=0.85, response=r) for r in ("states", "mean")}
    maps = {r: quick_double_dot("gaas-double", shape=(64, 64), temperature_K=1.0, snr=None, sensor=s, rng=2)
            for r, s in sensor.items()}
    sm = maps["states"]
    st = sm.states
    assert st.pixels.size > 500
    pix = st.pixels
    dev, t = sm.truth.device, sm.truth
    x = np.asarray(sm.data[sm.data.dims[-1]].values)
    y = np.asarray(sm.data[sm.data.dims[0]].values)
    gates = np.zeros((y.size, x.size, dev.n_gates))
    gates[..., dev.gate_index(t.x_gate)] = (x - 0.5 * (x[0] + x[-1]))[None, :]
    gates[..., dev.gate_index(t.y_gate)] = (y - 0.5 * (y[0] + y[-1]))[:, None]
    gates = gates.reshape(-1, dev.n_gates)[pix]
    ref = t.charge_state[32, 32].astype(float)
    ground = t.charge_state.reshape(-1, 2)[pix].astype(float)

    def level(n):
        return sensor_signal(sensor["states"], sensor_detuning_mV(sensor["states"], n, ref, gates))

    mixed = sum(st.probability[:, k] * level(ground + st.moves[k]) for k in range(st.moves.shape[0]))
    at_mean = level(ground + st.probability @ st.moves)
    np.testing.assert_allclose(maps["states"].clean.reshape(-1)[pix], mixed, rtol=0, atol=1e-12)
    np.testing.assert_allclose(maps["mean"].clean.reshape(-1)[pix], at_mean, rtol=0, atol=1e-12)
    assert np.max(np.abs(mixed - at_mean)) > 0.05 * t.extra["step_height"]


def test_unknown_sensor_response_is_named():
    from stabtool.simulate import SensorModel

    with pytest.raises(InputError, match="response"):
        SensorModel(response="instant")


def test_charge_noise_moves_the_lines_in_proportion_to_its_rms():
    # 1/f offset-charge noise shifts each line by (charge offset) × (its spacing per electron): at
    # T = 0 the pixels that change state are those the lines swept over, ∝ the mean |offset|, so
    # about proportional to the rms (common practice, no source)
    kw = dict(shape=(120, 200), temperature_K=0.0, snr=None, readout="charge", rng=4)
    base = quick_double_dot("gaas-double", **kw).data.values
    moved = {}
    for rms in (0.01, 0.03):
        sm = quick_double_dot("gaas-double", charge_noise_e=rms, **kw)
        assert sm.truth.artefacts["charge_noise_e"] == rms
        moved[rms] = float(np.mean(sm.data.values != base))
    assert 0.0 < moved[0.01] < 0.05
    assert 2.0 <= moved[0.03] / moved[0.01] <= 4.5
    with pytest.raises(InputError, match="charge_noise_e"):
        Artefacts(charge_noise_e=-0.1)
