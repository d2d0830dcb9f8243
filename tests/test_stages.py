"""Switching stages: vectorized DC solutions against per-sample scipy references, textbook
relations, monotonic behaviour, failure flagging."""

from __future__ import annotations

import pickle
import textwrap

import numpy as np
import pytest
from scipy import optimize

from tolerance.models.transistor import junction_currents
from tolerance.study import load_study

# ---------------------------------------------------------------------------------------------
# study helpers
# ---------------------------------------------------------------------------------------------

SINGLE_WIDE = """
stage = "single"
[ambient]
temperature = {min = "-40 degC", max = "125 degC"}
[supply]
voltage = {min = "5 V", max = "24 V"}
[drive]
high = {min = "2.5 V", max = "5 V"}
low = {min = "0 V", max = "0.8 V"}
source_resistance = {min = "0 ohm", max = "200 ohm"}
[parts.RB]
value = {min = "220 ohm", max = "10k"}
tempco = "200 ppm/K"
[parts.RPD]
value = {min = "2k", max = "100k"}
tempco = "-100 ppm/K"
[parts.Q1]
device = "small_signal_npn"
emitter_resistance = "0.3 ohm"
hfe = {min = 80, max = 400}
[load]
kind = "resistor"
resistance = {min = "60 ohm", max = "2k"}
"""

SINGLE_NOMINAL = """
stage = "single"
[ambient]
temperature = {min = "-40 degC", max = "85 degC"}
[supply]
voltage = {nominal = "12 V", tolerance = "10%"}
[drive]
high = {min = "2.9 V", max = "3.3 V"}
low = {min = "0 V", max = "0.4 V"}
source_resistance = "50 ohm"
[parts.RB]
value = "1k"
tolerance = "5%"
tempco = "200 ppm/K"
[parts.RPD]
value = "10k"
[parts.Q1]
device = "small_signal_npn"
hfe = {min = 100, max = 300}
[load]
kind = "resistor"
resistance = {nominal = "120 ohm", tolerance = "5%"}
"""


def study_from(tmp_path, text, name="study.toml"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return load_study(path)


def draw(study, n, seed):
    rng = np.random.default_rng(seed)
    return {p.name: p.distribution.ppf(rng.random(n)) for p in study.parameters}


def nominal(study, n=1, **pins):
    out = {p.name: np.full(n, p.nominal) for p in study.parameters}
    for k, v in pins.items():
        out[k.replace("__", ".")] = np.broadcast_to(np.asarray(v, float), (n,)).copy()
    return out


# ---------------------------------------------------------------------------------------------
# per-sample reference: node voltages with the internal transistor nodes, scipy root (hybr)
# ---------------------------------------------------------------------------------------------

def _root(system, x0):
    """scipy.optimize.root (hybr, xtol 1e-13) with the reference's own Jacobian, and
    Levenberg-Marquardt (lm, same tolerance) where hybr stalls; None unless the residual
    vanishes. ``system`` returns (residual, Jacobian)."""
    for method in ("hybr", "lm"):
        sol = optimize.root(system, x0, jac=True, method=method, options={"xtol": 1e-13})
        if np.all(np.abs(system(sol.x)[0]) < 1e-10):
            return sol.x
    return None


def _stepped(make, level, x0, steps=8):
    """Source stepping (classical continuation, from memory): raise the drive from 0 V to
    ``level`` in ``steps`` steps, each solve starting from the previous solution, a step that
    fails being split in halves (down to 1/1024 of it); returns the list of (drive, solution)."""
    path = []
    x = np.asarray(x0, dtype=float)
    v_prev = 0.0

    def reach(v_from, x_from, v_to, depth):
        nxt = _root(make(v_to), x_from)
        if nxt is not None or depth == 10:
            return nxt
        mid = reach(v_from, x_from, 0.5 * (v_from + v_to), depth + 1)
        return None if mid is None else reach(0.5 * (v_from + v_to), mid, v_to, depth + 1)

    for v in np.linspace(0.0, level, steps + 1):
        nxt = reach(v_prev, x, v, 0)
        assert nxt is not None, f"reference failed at drive {v:g} V"
        x, v_prev = nxt, v
        path.append((v, x))
    return path


class _Device:
    """Currents of one transistor from its internal node voltages, with the gradients with
    respect to (v_bi, v_ci, v_ei) assembled here from the model's junction derivatives."""

    def __init__(self, q):
        self.q = q

    def __call__(self, vbi, vci, vei):
        c = junction_currents(self.q, np.array([vbi - vei]), np.array([vbi - vci]))
        ib, ic = c.base[0], c.collector[0]
        dib = np.array([c.dbase_dvbe[0] + c.dbase_dvbc[0], -c.dbase_dvbc[0], -c.dbase_dvbe[0]])
        dic = np.array([c.dcollector_dvbe[0] + c.dcollector_dvbc[0], -c.dcollector_dvbc[0],
                        -c.dcollector_dvbe[0]])
        return ib, ic, dib, dic


def reference_single(stage, samples, k):
    """One sample of the single stage solved node by node (independent formulation).

    Unknowns: external base v_b, internal base v_bi, internal collector v_ci, internal
    emitter v_ei, external collector v_c; equations: KCL at the external base and collector
    and the three series-resistance branch equations (currents scaled by 100 ohm to volts).
    Each solve is reached by source stepping from the unbiased circuit.
    """
    t, vs, v_high, v_low, g_in, g_pd, q, load = stage._setup(samples)
    idx = np.array([k])
    q, load = q.subset(idx), load.take(idx)
    vs, v_high, v_low, g_in, g_pd = (a[idx][0] for a in (vs, v_high, v_low, g_in, g_pd))
    rb, rc, re = (float(np.broadcast_to(getattr(q, f), (1,))[0])
                  for f in ("base_resistance", "collector_resistance", "emitter_resistance"))
    ks = 100.0
    dev = _Device(q)

    def i_load(vc):
        i, g = load.current(np.array([vs - vc]))
        return i[0], g[0]

    def full(x, v_in, target=None):
        vb, vbi, vci, vei, vc = x[:5]
        ib, ic, dib, dic = dev(vbi, vci, vei)
        il, gl = i_load(vc)
        f = [((v_in - vb) * g_in - vb * g_pd - ib) * ks, vb - vbi - rb * ib,
             vc - vci - rc * ic, vei - re * (ib + ic), (il - ic) * ks]
        j = np.zeros((5, 5))
        j[0, 0] = -(g_in + g_pd) * ks
        j[0, 1:4] = -dib * ks
        j[1, 0] = 1.0
        j[1, 1:4] = -rb * dib
        j[1, 1] -= 1.0
        j[2, 1:4] = -rc * dic
        j[2, 2] -= 1.0
        j[2, 4] = 1.0
        j[3, 1:4] = -re * (dib + dic)
        j[3, 3] += 1.0
        j[4, 1:4] = -dic * ks
        j[4, 4] = -gl * ks
        if target is None:
            return np.array(f), j
        f.append((il - target) * ks)
        jt = np.zeros((6, 6))
        jt[:5, :5] = j
        jt[0, 5] = g_in * ks
        jt[5, 4] = -gl * ks
        return np.array(f), jt

    def on_eqs(v_in):
        return lambda x: full(x, v_in)

    out = {}
    rest = [0.0, 0.0, vs, 0.0, vs]
    path = _stepped(on_eqs, v_high, rest)
    vb, vbi, vci, vei, vc = path[-1][1]
    ib, ic, _, _ = dev(vbi, vci, vei)
    out.update(load_current=ic, vce_on=vc, base_current=ib, power_output=ic * vc + ib * vb)
    i_on = i_load(vc)[0]

    def edge(v_in):
        def f(x):
            vb, vbi, vei = x
            ib, ic, dib, dic = dev(vbi, vbi, vei)
            dib_e = np.array([dib[0] + dib[1], dib[2]])  # v_ci follows v_bi
            die_e = dib_e + np.array([dic[0] + dic[1], dic[2]])
            res = [((v_in - vb) * g_in - vb * g_pd - ib) * ks, vb - vbi - rb * ib,
                   vei - re * (ib + ic)]
            j = np.array([[-(g_in + g_pd) * ks, -dib_e[0] * ks, -dib_e[1] * ks],
                          [1.0, -1.0 - rb * dib_e[0], -rb * dib_e[1]],
                          [0.0, -re * die_e[0], 1.0 - re * die_e[1]]])
            return np.array(res), j
        return f
    xe = _stepped(edge, v_high, [0.0, 0.0, 0.0])[-1][1]
    ib, ic, _, _ = dev(xe[1], xe[1], xe[2])
    vc_edge = xe[1] + rc * ic
    out["drive_margin"] = ic / i_load(vc_edge)[0]

    x = _stepped(on_eqs, v_low, rest)[-1][1]
    out["off_current"] = dev(x[1], x[2], x[3])[1]

    target = 0.01 * i_on
    # bracket the target on the on-state path, narrow it by bisection (each point solved
    # from its lower neighbour), then solve with the drive as the sixth unknown
    lo = max(i for i, p in enumerate(path) if i_load(p[1][4])[0] <= target)
    (v_a, x_a), (v_b, _) = path[lo], path[lo + 1]
    for _ in range(12):
        v_m = 0.5 * (v_a + v_b)
        x_m = _root(on_eqs(v_m), x_a)
        assert x_m is not None, "reference bisection failed"
        if i_load(x_m[4])[0] <= target:
            v_a, x_a = v_m, x_m
        else:
            v_b = v_m
    x = _root(lambda x: full(x[:5], x[5], target), list(x_a) + [v_a])
    assert x is not None, "threshold reference failed"
    out["off_margin"] = x[5] - v_low
    return out


def test_single_matches_scipy_reference(tmp_path):
    # reference: scipy.optimize.root (hybr, xtol 1e-13) per sample on the node-voltage form of
    # the same circuit; both solve to ~1e-12 V, so 1e-6 relative is far above their noise
    study = study_from(tmp_path, SINGLE_WIDE)
    n = 220
    samples = draw(study, n, seed=42)
    res = study.stage.evaluate(samples)
    assert res["converged"].all()
    for k in range(n):
        ref = reference_single(study.stage, samples, k)
        for key, value in ref.items():
            got = res[key][k]
            assert got == pytest.approx(value, rel=1e-6, abs=1e-12 if "current" in key else 1e-9), \
                (key, k, got, value)


def test_single_nominal_study_is_sane(tmp_path):
    # common practice, no source: a 1 k base resistor from 3.3 V into a 100 mA lamp-size load
    # gives about 2.5 mA of base current, saturates a gain-100 transistor, and V_CE(on) stays
    # below a volt
    study = study_from(tmp_path, SINGLE_NOMINAL)
    res = study.stage.evaluate(nominal(study))
    assert res["converged"][0]
    assert 1.5e-3 < res["base_current"][0] < 2.6e-3
    assert res["drive_margin"][0] > 1.0
    assert 0.05 < res["vce_on"][0] < 1.0
    assert res["load_current"][0] == pytest.approx(
        (12 - res["vce_on"][0]) / 120.0, rel=1e-9)  # the resistor's own law
    assert res["off_margin"][0] > 0.2
    assert set(study.stage.metrics) <= set(res)


def test_drive_margin_above_one_means_saturated(tmp_path):
    # the edge solve and the on-state coincide at V_BC = 0 (definition of the metric), so the
    # sign of drive_margin - 1 is the sign of the on-state's intrinsic V_BC
    from tolerance.models.newton import newton_solve
    from tolerance.models.stages.single import SingleSystem

    study = study_from(tmp_path, SINGLE_WIDE)
    samples = draw(study, 3000, seed=9)
    stage = study.stage
    res = stage.evaluate(samples)
    t, vs, v_high, v_low, g_in, g_pd, q, load = stage._setup(samples)
    on = SingleSystem(q, load, vs, v_high, g_in, g_pd, "on")
    vbe0 = np.full(vs.shape, 0.7)
    r = newton_solve(on, np.stack([vbe0, vbe0 - 0.15], axis=1))
    vbc = r.x[:, 1]
    clear = np.abs(res["drive_margin"] - 1) > 1e-6
    assert np.all((res["drive_margin"][clear] > 1) == (vbc[clear] > 0))
    assert 0.05 < np.mean(res["drive_margin"] > 1) < 0.95  # both sides are exercised


def test_monotonic_sweeps(tmp_path):
    # common practice, no source: more base drive gives more drive margin, lower gain less;
    # a higher supply (more load current) less; more pull-down less
    study = study_from(tmp_path, SINGLE_NOMINAL)
    stage = study.stage
    rb = np.linspace(300, 5000, 40)
    m = stage.evaluate(nominal(study, 40, RB=rb))["drive_margin"]
    assert np.all(np.diff(m) < 0)
    hfe = np.geomspace(60, 400, 40)
    m = stage.evaluate(nominal(study, 40, Q1__hfe=hfe))["drive_margin"]
    assert np.all(np.diff(m) > 0)
    vs = np.linspace(8, 16, 40)
    m = stage.evaluate(nominal(study, 40, supply__voltage=vs))["drive_margin"]
    assert np.all(np.diff(m) < 0)
    rpd = np.geomspace(1e3, 1e6, 40)
    r = stage.evaluate(nominal(study, 40, RPD=rpd))
    assert np.all(np.diff(r["drive_margin"]) > 0)
    # a stronger pull-down keeps the switch off further: off_margin falls as RPD rises
    assert np.all(np.diff(r["off_margin"]) < 0)


def test_leakage_grows_with_temperature(tmp_path):
    # common practice (project reference list): I_CBO doubles every 10 K; the off-state current
    # (leakage times the gain it sees, plus the low level's own base drive) rises steeply with
    # temperature
    study = study_from(tmp_path, SINGLE_NOMINAL)
    t = np.linspace(233.15, 358.15, 30)
    off = study.stage.evaluate(nominal(study, 30, ambient__temperature=t,
                                       drive__low=0.0))["off_current"]
    assert np.all(np.diff(off) > 0)
    assert off[-1] / off[0] > 100


def test_non_convergence_is_flagged_not_dropped(tmp_path):
    study = study_from(tmp_path, SINGLE_NOMINAL)
    stage = pickle.loads(pickle.dumps(study.stage))
    stage.solver_options = {"max_iterations": 2}
    res = stage.evaluate(draw(study, 50, seed=1))
    assert res["converged"].shape == (50,) and not res["converged"].any()
    for key in stage.metrics:
        assert res[key].shape == (50,) and np.all(np.isnan(res[key]))


def test_stage_pickles_and_gives_identical_results(tmp_path):
    # joblib's loky pickles the configured stage into each worker
    study = study_from(tmp_path, SINGLE_WIDE)
    samples = draw(study, 500, seed=3)
    a = study.stage.evaluate(samples)
    b = pickle.loads(pickle.dumps(study.stage)).evaluate(samples)
    for key in a:
        np.testing.assert_array_equal(a[key], b[key])


def test_chunk_composition_does_not_change_results(tmp_path):
    # each sample is its own system: results must not depend on the other samples of the chunk
    study = study_from(tmp_path, SINGLE_WIDE)
    samples = draw(study, 600, seed=4)
    whole = study.stage.evaluate(samples)
    part = study.stage.evaluate({k: v[100:200] for k, v in samples.items()})
    for key in study.stage.metrics:
        np.testing.assert_allclose(part[key], whole[key][100:200], rtol=1e-9, atol=1e-15)
