"""Process settings: float64 and the persistent compilation cache (models/runtime.py)."""
import jax

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
