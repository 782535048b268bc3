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
