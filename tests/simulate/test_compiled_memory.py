"""Memory of the compiled core: it grows with samples x sets x outputs (the results), never
with the number of integration steps, and the SSE mode keeps no trajectory at all.

numba's runtime counts its own allocations when NUMBA_NRT_STATS=1
(numba.core.runtime.rtsys.get_allocation_stats); Python-side allocations are traced with
the standard library's tracemalloc.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
import tracemalloc
from pathlib import Path

import numpy as np

from graybox.data.record import record_from_arrays
from graybox.simulate import Tolerances, plan
from graybox.simulate.compiled import compile_model

from . import conftest as M

REPO = Path(__file__).resolve().parents[2]

CHILD = textwrap.dedent("""
    import json, sys
    sys.path.insert(0, "tests/simulate")
    import numpy as np
    import conftest as M
    from numba.core.runtime import rtsys
    from graybox.simulate import Tolerances, plan
    from graybox.simulate.compiled import compile_model
    spec = M.lag_spec("estimate")
    cm = compile_model(spec)
    rows = []
    for n in (500, 5000):
        tl = plan(spec, M.lag_record(n=n))
        for rtol in (1e-6, 1e-11):
            for sens in (False, True):
                kw = dict(x0_est=np.full((4, 1), 0.1), sens=sens, tol=Tolerances(rtol=rtol))
                cm.simulate(tl, np.tile([2.0, 5.0], (4, 1)), **kw)
                before = rtsys.get_allocation_stats()
                res = cm.simulate(tl, np.tile([2.0, 5.0], (4, 1)), **kw)
                after = rtsys.get_allocation_stats()
                rows.append([n, rtol, sens, res.n_steps, after.alloc - before.alloc, after.free - before.free])
    print(json.dumps(rows))
""")


def test_kernel_allocations_do_not_depend_on_steps_or_samples():
    """numba-side allocations per call are the same for 500 and 5,000 samples and for a
    loose and a tight tolerance (about 5x the steps), and all are freed."""
    env = dict(os.environ, NUMBA_NRT_STATS="1")
    out = subprocess.run([sys.executable, "-c", CHILD], env=env, cwd=REPO, capture_output=True, text=True,
                         timeout=600)
    assert out.returncode == 0, out.stderr
    rows = json.loads(out.stdout.strip().splitlines()[-1])
    for sens in (False, True):
        mine = [r for r in rows if r[2] == sens]
        steps = [r[3] for r in mine]
        assert max(steps) > 20 * min(steps)  # the runs differ widely in steps
        assert len({r[4] for r in mine}) == 1, mine  # ...but not in allocations
        assert all(r[4] == r[5] for r in mine)  # everything allocated is freed


def test_sse_mode_keeps_no_trajectory():
    """200,000 samples x 16 sets: the SSE call allocates (Python side) far less than one
    trajectory of the batch would take (16 x 200,000 x 8 bytes = 25.6 MB)."""
    n, n_sets = 200_000, 16
    t = np.arange(n) * 10.0
    rng = np.random.default_rng(5)
    u = np.repeat(rng.uniform(0.0, 2.0, n // 100), 100)
    rec = record_from_arrays("big", t, {"u": u}, {"y": np.zeros(n)})
    spec = M.lag_spec("estimate")
    tl = plan(spec, rec)
    cm = compile_model(spec)
    theta = np.column_stack([np.full(n_sets, 2.0), np.linspace(100.0, 2000.0, n_sets)])
    x0 = np.zeros((n_sets, 1))
    cm.sse(tl, theta, x0_est=x0)  # tables built, kernel loaded
    tracemalloc.start()
    try:
        sse, n_used, ok = cm.sse(tl, theta, x0_est=x0)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert ok.all() and n_used.tolist() == [n]
    assert peak < 0.02 * n_sets * n * 8, f"peak {peak} bytes"


def test_simulate_memory_does_not_grow_with_steps():
    """simulate(): the Python-side peak is the result arrays, the same for a loose and a
    tight tolerance."""
    spec = M.lag_spec("estimate")
    tl = plan(spec, M.lag_record(n=20_000))
    cm = compile_model(spec)
    theta, x0 = np.tile([2.0, 5.0], (8, 1)), np.zeros((8, 1))
    peaks, steps = [], []
    for rtol in (1e-5, 1e-11):
        cm.simulate(tl, theta, x0_est=x0, tol=Tolerances(rtol=rtol))
        tracemalloc.start()
        try:
            res = cm.simulate(tl, theta, x0_est=x0, tol=Tolerances(rtol=rtol))
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        peaks.append(peak)
        steps.append(res.n_steps)
    assert steps[1] > 5 * steps[0]
    result_bytes = 8 * 20_000 * 8
    assert result_bytes <= peaks[0] < 1.5 * result_bytes
    assert abs(peaks[1] - peaks[0]) < 0.05 * result_bytes
