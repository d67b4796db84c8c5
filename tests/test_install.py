"""Install hygiene: numba caches Tenfold's kernels in a per-user folder, never next to the installed sources."""

from __future__ import annotations

import json
import os
import subprocess
import sys

_PROBE = (
    "import json, tenfold.analysis.refine as r, numba;"
    "k = next(v for v in vars(r).values() if hasattr(v, '_cache') and hasattr(v._cache, '_cache_path'));"
    "print(json.dumps({'path': k._cache._cache_path, 'env': numba.config.CACHE_DIR}))"
)


def _probe(env: dict) -> dict:
    out = subprocess.run([sys.executable, "-c", _PROBE], env=env, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_numba_cache_goes_to_user_cache_folder(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["XDG_CACHE_HOME"] = str(tmp_path)
    got = _probe(env)
    assert got["env"] == str(tmp_path / "tenfold" / "numba")
    assert got["path"].startswith(str(tmp_path / "tenfold" / "numba"))


def test_user_numba_cache_dir_is_kept(tmp_path):
    env = dict(os.environ, NUMBA_CACHE_DIR=str(tmp_path / "mine"))
    assert _probe(env)["path"].startswith(str(tmp_path / "mine"))
