"""The persistent compilation cache: entries appear on disk, and a second process reuses them;
`psiloom.testing.compilations` counts compilations from JAX's compile log."""

import json
import os
import subprocess
import sys

import pytest

from psiloom.compilation import default_cache_dir, enable_compilation_cache

_SCRIPT = r"""
import json, os, sys
import jax, jax.numpy as jnp
from psiloom.compilation import enable_compilation_cache
enable_compilation_cache(sys.argv[1], min_compile_seconds=0.0)
f = jax.jit(lambda x: jnp.linalg.slogdet(x @ x.T + jnp.eye(x.shape[0]))[1])
value = float(f(jnp.arange(64.0).reshape(8, 8) / 64))
print(json.dumps({"value": value, "numba": os.environ["NUMBA_CACHE_DIR"]}))
"""


def _run(directory):
    out = subprocess.run([sys.executable, "-c", _SCRIPT, str(directory)], capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_cache_entries_are_written_and_reused(tmp_path):
    env_numba = os.environ.get("NUMBA_CACHE_DIR")
    first = _run(tmp_path)
    entries = sorted(os.listdir(tmp_path / "jax"))
    assert entries, "no compiled program was written to the cache"
    second = _run(tmp_path)
    assert second["value"] == first["value"]
    assert sorted(os.listdir(tmp_path / "jax")) == entries  # reused, nothing new compiled
    expected_numba = env_numba if env_numba else str(tmp_path / "numba")
    assert first["numba"] == expected_numba


@pytest.mark.parametrize("bad", [float("nan"), -1.0, "1", True, float("inf")])
def test_bad_min_compile_seconds(bad, tmp_path):
    with pytest.raises(ValueError, match="min_compile_seconds"):
        enable_compilation_cache(tmp_path, min_compile_seconds=bad)


def test_bad_directory(tmp_path):
    afile = tmp_path / "file"
    afile.write_text("x")
    with pytest.raises(ValueError, match="not a folder"):
        enable_compilation_cache(afile)
    with pytest.raises(ValueError, match="directory"):
        enable_compilation_cache("")


def test_default_dir_follows_xdg(monkeypatch, tmp_path):
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    assert default_cache_dir() == str(tmp_path / "psiloom")


def test_compilations_counts_each_new_shape_once():
    import jax
    import jax.numpy as jnp

    from psiloom.testing import compilations

    def doubled(x):
        return 2.0 * x

    f = jax.jit(doubled)
    with compilations() as names:
        f(jnp.ones(3))
        f(jnp.ones(3))  # served from the in-memory cache: no compilation
        f(jnp.ones(4))  # a new shape: a second compilation
    assert names.count("jit(doubled)") == 2, names
    with compilations() as names:
        f(jnp.ones(4))
    assert "jit(doubled)" not in names, names
