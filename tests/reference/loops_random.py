"""Seeded random loops for cross-checks against independent libraries (test data, not demo data)."""

from __future__ import annotations

import numpy as np

from audit.loop import Controller, LoopModel, make_process


def random_loop(rng: np.random.Generator, allow_delay: bool = True, allow_unstable_plant: bool = True) -> LoopModel:
    """One random loop: any model type and controller form, sometimes the wrong action."""
    kind = rng.choice(["fopdt", "sopdt", "ipdt", "tf_unstable", "tf_lag3"] if allow_unstable_plant
                      else ["fopdt", "sopdt", "ipdt", "tf_lag3"])
    tau1 = float(10 ** rng.uniform(-0.5, 1.5))
    theta = float(10 ** rng.uniform(-1.5, 0.5)) if allow_delay else 0.0
    K = float(rng.choice([-1, 1]) * 10 ** rng.uniform(-0.5, 0.7))
    if kind == "fopdt":
        P = make_process("fopdt", K, tau1, dead_time=theta)
        scale = tau1 / (abs(K) * max(theta, 0.2 * tau1))
        ti = tau1
    elif kind == "sopdt":
        tau2 = tau1 * float(rng.uniform(0.05, 0.8))
        lead = float(rng.choice([0.0, 0.0, -0.3 * tau2, 0.5 * tau2]))
        P = make_process("sopdt", K, tau1, tau2, lead, theta)
        scale = tau1 / (abs(K) * max(theta + tau2, 0.2 * tau1))
        ti = tau1
    elif kind == "ipdt":
        kp = K / tau1
        P = make_process("ipdt", kp, float(rng.choice([0.0, 0.3 * tau1])), dead_time=theta)
        scale = 1.0 / (abs(kp) * max(theta + 0.3 * tau1, 0.1 * tau1))
        ti = 8 * max(theta, 0.1 * tau1) + 2 * tau1
    elif kind == "tf_unstable":
        # K / ((tau1 s - 1)(0.1 tau1 s + 1)): one open-loop unstable pole
        P = make_process("tf", num=[K], den=np.polymul([tau1, -1.0], [0.1 * tau1, 1.0]), dead_time=0.1 * theta)
        scale = 2.0 / abs(K)
        ti = 4 * tau1
    else:
        # K / (tau1 s + 1)^3: conditionally stable with some tunings
        P = make_process("tf", num=[K], den=np.polymul(np.polymul([tau1, 1.0], [tau1, 1.0]), [tau1, 1.0]),
                         dead_time=theta)
        scale = 1.0 / abs(K)
        ti = 2 * tau1
    kc = float(scale * 10 ** rng.uniform(-0.6, 0.6))
    form = rng.choice(["ideal", "series", "parallel"])
    td = float(rng.choice([0.0, 0.0, 0.25 * ti]))
    ti_use = None if rng.uniform() < 0.1 and kind not in ("ipdt",) else float(ti * 10 ** rng.uniform(-0.4, 0.4))
    if form == "parallel":
        C = Controller("parallel", kp=kc, ki=(kc / ti_use if ti_use else 0.0), kd=kc * td, alpha=0.1)
    else:
        C = Controller(str(form), kc=kc, ti=ti_use, td=td, alpha=0.1)
    correct = 1.0 if K > 0 else -1.0
    sign = correct if rng.uniform() < 0.9 else -correct
    pvf = float(rng.choice([0.0, 0.0, 0.05 * tau1]))
    sample = float(rng.choice([0.0, 0.0, 0.1 * max(theta, 0.05)]))
    return LoopModel("rnd", P, C, sign, pvf, sample)


def random_loops(n: int, seed: int, **kw) -> list[LoopModel]:
    rng = np.random.default_rng(seed)
    return [random_loop(rng, **kw) for _ in range(n)]


def _poly(roots) -> np.ndarray:
    return np.real(np.poly(np.asarray(roots, complex))) if len(roots) else np.array([1.0])


def _pair(rng, lo: float, hi: float, zeta_exp=(-4.5, -0.2), undamped: float = 0.0) -> list[complex]:
    wn = float(10 ** rng.uniform(lo, hi))
    zeta = 0.0 if rng.uniform() < undamped else float(10 ** rng.uniform(*zeta_exp))
    wd = wn * np.sqrt(max(1.0 - zeta * zeta, 0.0))
    return [complex(-zeta * wn, wd), complex(-zeta * wn, -wd)]


def random_tf_loop(rng: np.random.Generator) -> LoopModel:
    """One random ``tf`` loop under a PID controller: real poles (some unstable), lightly damped
    pairs (damping 3e-5 to 0.6; some unstable), zeros (right half-plane ones, lightly damped
    pairs, some undamped), integrators, biproper plants, high order (up to nine poles), half of them without dead
    time. The gain puts |L| near 1 somewhere around the plant's roots, so crossings and peaks are
    where the roots are."""
    poles: list[complex] = []
    for _ in range(int(rng.integers(0, 4))):
        p = float(10 ** rng.uniform(-1, 1))
        poles.append(complex(p if rng.uniform() < 0.12 else -p, 0.0))
    for _ in range(int(rng.integers(0, 3))):
        pr = _pair(rng, -1, 1)
        if rng.uniform() < 0.08:
            pr = [complex(-z.real, z.imag) for z in pr]
        poles.extend(pr)
    if not poles:
        poles.append(complex(-float(10 ** rng.uniform(-1, 1)), 0.0))
    zeros: list[complex] = []
    room = len(poles)
    for _ in range(int(rng.integers(0, 3))):
        if room - len(zeros) >= 2 and rng.uniform() < 0.4:
            zeros.extend(_pair(rng, -1, 1, (-3.5, -0.2), undamped=0.1))
        elif room - len(zeros) >= 1:
            z = float(10 ** rng.uniform(-1, 1))
            zeros.append(complex(z if rng.uniform() < 0.3 else -z, 0.0))
    biproper = rng.uniform() < 0.15 and len(zeros) < len(poles)
    while biproper and len(zeros) < len(poles):
        zeros.append(complex(-float(10 ** rng.uniform(-1, 1)), 0.0))
    den = _poly(poles)
    if rng.uniform() < 0.2:
        den = np.polymul(den, [1.0, 0.0])
    num = _poly(zeros)
    theta = 0.0 if rng.uniform() < 0.5 else float(10 ** rng.uniform(-1.5, 0.3))
    P0 = make_process("tf", num=num, den=den, dead_time=theta)
    kind = rng.choice(["P", "PI", "PID"])
    ref = np.abs(np.concatenate([poles, zeros]))
    ref = ref[ref > 0]
    w_ref = float(rng.choice(ref)) * float(10 ** rng.uniform(-0.3, 0.3))
    g = abs(P0.rational(np.array([1j * w_ref]))[0])
    kc = float(10 ** rng.uniform(-1.8, 0.5)) / max(g, 1e-12)
    ti = None if kind == "P" else float(10 ** rng.uniform(0.0, 1.0)) / w_ref
    td = float(10 ** rng.uniform(-1.0, 0.0)) / w_ref if kind == "PID" else 0.0
    C = Controller("ideal", kc=kc, ti=ti, td=td, alpha=0.1)
    sign = 1.0 if rng.uniform() < 0.9 else -1.0
    return LoopModel("tf-rnd", P0, C, sign, 0.0, 0.0)


def random_tf_loops(n: int, seed: int) -> list[LoopModel]:
    """``n`` loops of :func:`random_tf_loop` from one seed."""
    rng = np.random.default_rng(seed)
    return [random_tf_loop(rng) for _ in range(n)]
