"""How much of the oracle's lift a 90 %-safe plan can keep at a given noise level, on the
"opposed" design (apportion/demo/designs.py): the oracle LP (scipy linprog, HiGHS) at the harm
threshold lowered by z_0.9 x sd, where sd is the sampling sd of a treat-everyone plan's harm
estimate when a share f of the n units estimates the cells: sd = sqrt(var(y1)) sqrt(2 / (f n/4))
with var(y1) = sigma^2 + 0.2^2 (x5's prognostic term). A perfect partition and no selection
error are assumed, so real plans sit below these figures; a plan that keeps some members on
control has a smaller sd, so the figure is a guide, not a strict bound. Prints one JSON line.

    python bench/decisions_ceiling.py
"""

import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np  # noqa: E402
from scipy.optimize import linprog  # noqa: E402
from scipy.stats import norm  # noqa: E402

from apportion.demo import designs as d  # noqa: E402

rng = np.random.default_rng(12345)
xt = d.features(400_000, rng)
tau = d.effects(xt, "opposed")
_, inv = np.unique(d._fine_cell(xt), return_inverse=True)
cnt = np.bincount(inv)
c = len(cnt)
m = np.stack([np.bincount(inv, tau[:, j, k]) / cnt for j in range(4) for k in range(3)], 1).reshape(
    c, 4, 3
)
p = cnt / 400_000


def orc(t1, t2=0.01):
    r = linprog(
        -(p[:, None] * m[:, :, 0]).ravel(),
        A_ub=np.stack([(p[:, None] * m[:, :, k]).ravel() for k in (1, 2)]),
        b_ub=[t1, t2],
        A_eq=np.kron(np.eye(c), np.ones(4)),
        b_eq=np.ones(c),
        bounds=(0, None),
        method="highs-ds",
    )
    return -r.fun


full = orc(0.03)
z = norm.ppf(0.9)
rows = []
for n in (200_000, 1_000_000):
    for s in (0.5, 1, 2):
        for f in (0.5, 1.0):
            sd = np.sqrt(0.04 + s**2) * np.sqrt(2 / (f * n / 4))
            t = max(0.03 - z * sd, 0)
            rows.append(
                {
                    "n": n,
                    "sigma": s,
                    "estimation_share": f,
                    "harm_sd": round(float(sd), 4),
                    "threshold_held": round(float(t), 4),
                    "capture_ceiling": round(float(orc(t) / full), 3),
                }
            )
print(json.dumps({"bench": "decisions_ceiling", "rows": rows}))
