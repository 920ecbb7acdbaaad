"""The on-disk cache of generated modules and numba machine code.

numba's documented dispatcher statistics (``dispatcher.stats.cache_hits`` and
``cache_misses``, counters by signature) tell whether a kernel's machine code was loaded
from the cache or compiled.  A second process running the same model must load it.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from graybox.simulate.cache import module_key, write_once
from graybox.simulate.kernel_source import module_source

from . import conftest as M

REPO = Path(__file__).resolve().parents[2]

CHILD = textwrap.dedent("""
    import json, sys
    import numpy as np
    from graybox.configkit import Table
    from graybox.data.record import record_from_arrays
    from graybox.model.build import build_spec
    from graybox.simulate import plan
    from graybox.simulate.compiled import compile_model
    m = {"states": {"y": {"units": "", "rate": "(K*u - y)/tau + 0.125*K/tau", "initial": 0.5}}, "inputs": {"u": ""}}
    p = {"K": {"guess": 2.0}, "tau": {"guess": 5.0, "units": "s"}}
    spec = build_spec(Table(m, ("model",)), Table(p, ("parameters",)))
    t = np.arange(50.0)
    rec = record_from_arrays("r", t, {"u": np.sin(t / 5)}, {"y": np.cos(t / 7)})
    cm = compile_model(spec)
    sse, n_used, ok = cm.sse(plan(spec, rec), np.array([[2.0, 5.0]]))
    stats = cm.module.run_fast.stats
    print(json.dumps({"hits": sum(stats.cache_hits.values()), "misses": sum(stats.cache_misses.values()),
                      "cache_path": stats.cache_path, "sse": float(sse[0, 0]), "ok": bool(ok[0])}))
""")


def run_children(cache: Path, n: int) -> list[dict]:
    env = dict(os.environ, GRAYBOX_CACHE_DIR=str(cache))
    procs = [subprocess.Popen([sys.executable, "-c", CHILD], env=env, cwd=REPO, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for _ in range(n)]
    out = []
    for p in procs:
        stdout, stderr = p.communicate(timeout=300)
        assert p.returncode == 0, stderr
        out.append(json.loads(stdout.strip().splitlines()[-1]))
    return out


@pytest.mark.skipif(os.name != "posix", reason="the compile lock uses fcntl")
def test_second_process_loads_compiled_code(tmp_path):
    """Two processes starting together on an empty cache: one compiles, the other waits for
    it and loads the machine code (cache hit, no miss); a third process later loads it too;
    all three give the same result."""
    cache = tmp_path / "cache"
    first = run_children(cache, 2)
    assert all(r["ok"] for r in first)
    compiled = [r for r in first if r["misses"] >= 1]
    loaded = [r for r in first if r["misses"] == 0 and r["hits"] >= 1]
    assert len(compiled) == 1 and len(loaded) == 1, first
    (third,) = run_children(cache, 1)
    assert third["hits"] >= 1 and third["misses"] == 0
    assert Path(third["cache_path"]).resolve().parent == cache.resolve()
    assert first[0]["sse"] == first[1]["sse"] == third["sse"]
    modules = list(cache.glob("graybox_compiled_*.py"))
    assert len(modules) == 1
    assert not list(cache.glob(".*.tmp"))  # no temporary file left behind


def test_write_once_keeps_the_first_file(tmp_path):
    """An existing module file is never rewritten (numba's index checks its time stamp)."""
    path = write_once(tmp_path, "graybox_compiled_x", "A = 1\n")
    stamp = path.stat().st_mtime_ns
    again = write_once(tmp_path, "graybox_compiled_x", "A = 1\n")
    assert again == path and path.stat().st_mtime_ns == stamp and path.read_text() == "A = 1\n"
    assert [p.name for p in tmp_path.iterdir()] == ["graybox_compiled_x.py"]


def test_key_follows_the_text():
    """Another model text gives another file; the same text the same file."""
    a, b = module_source(M.lag_spec("0.0")), module_source(M.tank_spec())
    assert module_key("d", a) == module_key("d", a) != module_key("d", b)


def test_generated_text_holds_no_user_text():
    """Code comes from the validated trees only: no user name, unit or equation text."""
    model = {"name": "zorblax_vessel",
             "states": {"zorblax_level": {"units": "m", "rate": "(zorb_in - zorb_k*sqrt(zorblax_level))/zorb_area",
                                          "initial": "estimate"}},
             "inputs": {"zorb_in": "m^3/s"}}
    params = {"zorb_k": {"guess": 0.1, "units": "m^2.5/s"}, "zorb_area": {"guess": 2.0, "units": "m^2"}}
    source = module_source(M.build(model, params))
    assert "zorb" not in source.lower()
    compile(source, "<check>", "exec")  # valid Python


def test_same_trees_share_one_module():
    """Initial-state modes are handled outside the generated code: lag models that differ only
    there share one module (one compilation)."""
    from graybox.simulate.compiled import compile_model

    from graybox.simulate import plan

    a = compile_model(M.lag_spec("estimate"))
    b = compile_model(M.lag_spec("0.0"))
    assert a is not b and a.module is b.module
    rec = M.lag_record()
    ya = a.simulate(plan(a.spec, rec), np.array([[2.0, 5.0]]), x0_est=np.array([[0.0]])).outputs["y"]
    yb = b.simulate(plan(b.spec, rec), np.array([[2.0, 5.0]])).outputs["y"]
    assert np.array_equal(ya, yb)
