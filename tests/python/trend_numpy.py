"""Mean, sample standard deviation (ddof=1) and mean ± 3σ of the numbers on stdin (a JSON list),
with numpy: the reference for the trend's Shewhart control limits (tests/service/trend_report.rs)."""
import json
import sys

import numpy as np

values = np.array(json.load(sys.stdin), dtype=float)
mean = float(np.mean(values))
sd = float(np.std(values, ddof=1))
print(json.dumps({"numpy": np.__version__, "mean": mean, "sd": sd,
                  "low": mean - 3 * sd, "high": mean + 3 * sd}))
