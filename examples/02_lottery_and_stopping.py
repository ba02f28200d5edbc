"""(b) A price list beside the hive game, fitted jointly: one risk attitude r for both tasks.

Each keeper also answers an invented ten-row price list: option A pays 30 or 24 jars,
option B 58 or 2, with the high payoff's chance k/10 in row k. A joint fit shares the
parameters both models name (r, precision) and clusters the two tasks by keeper.

Run: python examples/02_lottery_and_stopping.py   (about half a minute; --small: quicker)
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from _setup import arguments, hive_design

import stopwise

args = arguments(__doc__.splitlines()[0])
keepers, rounds = (10, 10) if args.small else (40, 24)
people = pd.DataFrame({"subject": [f"k{i + 1:02d}" for i in range(keepers)]})
people["r"], people["precision"] = 0.5, 2.0
hives = stopwise.simulate("crra+myopic+logit", people, hive_design(keepers, rounds), seed=3)

chance = np.arange(1, 11) / 10
rows = pd.DataFrame(
    {
        "item": np.arange(1, 11),
        "a_x1": 30.0,
        "a_p1": chance,
        "a_x2": 24.0,
        "a_p2": 1 - chance,
        "b_x1": 58.0,
        "b_p1": chance,
        "b_x2": 2.0,
        "b_p2": 1 - chance,
    }
)
price_list = people[["subject"]].merge(rows, how="cross")
lottery = stopwise.simulate("crra+logit", people, price_list, seed=4)
print(stopwise.describe(lottery))  # share choosing B per row: it should rise with k

# Separate fits first: each task alone pins r down only so far (see the two SEs) ...
alone = stopwise.fit("crra+myopic+logit", hives, progress=False)
print(alone.summary())
# ... then jointly. Every parameter of the same name is one coefficient: here r and
# precision (the notes say so), which is right for these simulated keepers, who bring the
# same r and precision to both tasks. Expect the joint SE of r to be smaller than the
# hive-only one, and both estimates near the true r = 0.5.
joint = stopwise.fit_joint([("crra+myopic+logit", hives), ("crra+logit", lottery)], progress=False)
print(joint.summary())
se = {name: fit.params.loc["r", "se"] for name, fit in (("hives only", alone), ("joint", joint))}
print("SE of r:", {k: round(float(v), 4) for k, v in se.items()})
