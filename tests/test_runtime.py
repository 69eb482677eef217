"""Process settings: float64 and the persistent compilation cache (models/runtime.py)."""
import os

import jax
import jax.numpy as jnp
import pytest

from crosswind.models import runtime


def test_float64_is_on():
    assert jax.config.jax_enable_x64


def test_cache_folder_follows_the_environment(monkeypatch, tmp_path):
    monkeypatch.delenv("CROSSWIND_CACHE", raising=False)
    monkeypatch.delenv("CROSSWIND_CACHE_DIR", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path))
    assert runtime.cache_dir() == str(tmp_path / "crosswind")
    monkeypatch.setenv("CROSSWIND_CACHE_DIR", str(tmp_path / "mine"))
    assert runtime.cache_dir() == str(tmp_path / "mine")
    monkeypatch.setenv("CROSSWIND_CACHE", "off")
    assert runtime.cache_dir() is None


def test_xla_tuning_appends_the_flag_only_where_safe():
    flag = "--xla_cpu_experimental_ynn_fusion_type="
    lo = runtime._YNN_OFF_VERSIONS[0]
    env = {"XLA_FLAGS": "--xla_force_host_platform_device_count=2"}
    assert runtime.xla_tuning(env, version=lo, started=False)
    assert env["XLA_FLAGS"] == "--xla_force_host_platform_device_count=2 " + flag
    assert not runtime.xla_tuning(env, version=lo, started=False)         # never twice
    env = {}
    assert runtime.xla_tuning(env, version=lo, started=False) and env["XLA_FLAGS"] == flag
    # a user's own setting of the flag is kept as it is
    env = {"XLA_FLAGS": flag + "individual_dot"}
    assert not runtime.xla_tuning(env, version=lo, started=False)
    assert env["XLA_FLAGS"] == flag + "individual_dot"
    # backends already started (too late to matter), a jaxlib outside the measured range (XLA
    # aborts on an unknown flag), or switched off: nothing is touched
    for kw, extra in ((dict(version=lo, started=True), {}),
                      (dict(version=(0, 4), started=False), {}),
                      (dict(version=runtime._YNN_OFF_VERSIONS[1], started=False), {}),
                      (dict(version=lo, started=False), {"CROSSWIND_XLA_TUNING": "off"})):
        env = dict(extra)
        assert not runtime.xla_tuning(env, **kw)
        assert "XLA_FLAGS" not in env


def test_jaxlib_version_is_read_as_numbers():
    v = runtime._jaxlib_version()
    assert len(v) == 2 and all(isinstance(x, int) for x in v)


def test_xla_tuning_reaches_the_compiler():
    """Importing crosswind.models set the flag before JAX started (tests/conftest.py imports it
    first): a reduction that XLA would hand to YNNPACK compiles as its own fused loop."""
    lo, hi = runtime._YNN_OFF_VERSIONS
    if not (lo <= runtime._jaxlib_version() < hi) or os.environ.get("CROSSWIND_XLA_TUNING") == "off":
        pytest.skip("the tuning flag does not apply to this jaxlib")
    assert "--xla_cpu_experimental_ynn_fusion_type=" in os.environ.get("XLA_FLAGS", "")
    a = jnp.ones((100000, 2))
    text = jax.jit(lambda x, y: jnp.max(x / y, axis=-1).sum()).lower(a, a).compile().as_text()
    assert "__ynn_fusion" not in text
