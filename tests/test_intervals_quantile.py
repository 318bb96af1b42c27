"""Student's t quantiles without importing scipy.stats (plugins/survey/intervals.py).

Reference: scipy.stats.t.ppf, a general-purpose reference library, over the probabilities and degrees of
freedom the intervals ask for.
"""

import subprocess
import sys
from pathlib import Path

import numpy as np
from scipy import stats

from grainhabit.plugins.survey.intervals import t_quantile


def test_t_quantile_equals_scipy_stats_t_ppf():
    q = np.array([0.5, 0.8, 0.9, 0.95, 0.975, 0.995, 0.9995])
    df = np.array([1, 2, 3, 4, 5, 7, 10, 19, 30, 99, 1000, 1e6, 2.5])
    qq, dd = np.meshgrid(q, df)
    assert np.array_equal(t_quantile(qq, dd), stats.t.ppf(qq, dd))
    # scalars, as the interval code passes them
    assert t_quantile(0.975, 9) == stats.t.ppf(0.975, 9)
    # a textbook value (two-sided 95 %, 9 degrees of freedom: 2.262, common tables)
    assert abs(t_quantile(0.975, 9) - 2.262) < 5e-4


def test_the_sample_summary_does_not_load_scipy_stats():
    # the main process summarises after the last frame: scipy.stats (about 0.4 s of CPU to load) must not be
    # on that path. A lazily registered module sits in sys.modules unloaded: its submodule tells a real load.
    code = """
import sys
sys.path.insert(0, "tests")
from builders import make_groups
assert "scipy.stats._stats_py" not in sys.modules
groups, attrs = make_groups({"a": dict(gm=400.0, gsd=1.1, habits={"cube": 0.7, "octahedron": 0.3},
                                        alpha=(1.0, 0.1), batch="B1", date="2031-05-01")})
loaded = "scipy.stats._stats_py" in sys.modules
print("ok" if not loaded else "loaded")
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=str(Path(__file__).resolve().parents[1]))
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip().endswith("ok"), out.stdout
