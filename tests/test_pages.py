"""rfisieve.engine.pages: numpy's huge-page advice is off while the engine runs, restored after,
and left alone when the user set NUMPY_MADVISE_HUGEPAGE."""

import pytest
from numpy._core import multiarray

from rfisieve.engine.pages import small_pages


def _current():
    prev = multiarray._set_madvise_hugepage(True)   # returns the setting it replaces
    multiarray._set_madvise_hugepage(prev)
    return prev


def test_off_inside_restored_after(monkeypatch):
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    seen = []
    f = small_pages(lambda: seen.append(_current()))
    for before in (True, False):
        multiarray._set_madvise_hugepage(before)
        f()
        assert seen[-1] is False
        assert _current() is before


def test_restored_after_an_error(monkeypatch):
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    multiarray._set_madvise_hugepage(True)

    @small_pages
    def fails():
        raise RuntimeError("x")

    with pytest.raises(RuntimeError):
        fails()
    assert _current() is True


def test_user_setting_wins(monkeypatch):
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    multiarray._set_madvise_hugepage(True)
    seen = []
    small_pages(lambda: seen.append(_current()))()
    assert seen == [True]
