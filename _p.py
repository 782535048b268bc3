import time, numpy as np
from tests.reference.test_multiloop_reference import _random_group
from tests.reference.multiloop_pade import closed_loop_poles
from audit.multiloop.figures import group_stability
rng = np.random.default_rng(20261202)
tp=tn=0; stab=0
for c in range(30):
    g=_random_group(rng)
    t=time.time(); closed_loop_poles(g,12); tp+=time.time()-t
    t=time.time(); s=group_stability(g); tn+=time.time()-t; stab+=s.stable
print(tp, tn, stab)
