"""The threads run setting caps every DuckDB connection the library opens."""

from __future__ import annotations

import pytest

from harmonize import connections, settings
from harmonize.errors import HarmonizeError


def test_threads_setting_caps_each_connection(tmp_path) -> None:  # type: ignore[no-untyped-def]
    with settings.applied(settings.Settings(threads="1")):
        con = connections.connect(str(tmp_path / "x.duckdb"))
        assert con.execute("SELECT current_setting('threads')").fetchall()[0][0] == 1
        con.close()
    with settings.applied(settings.Settings(threads="2")):
        assert connections.connect().execute("SELECT current_setting('threads')").fetchall()[0][0] == 2


def test_threads_from_the_environment_and_bad_values() -> None:
    assert settings.from_environment({"HARMONIZE_THREADS": " 3 "}).threads == "3"
    for bad in ("0", "-2", "two", "1.5"):
        with settings.applied(settings.Settings(threads=bad)), pytest.raises(HarmonizeError) as err:
            connections.thread_count()
        assert str(err.value) == (f"the threads setting (HARMONIZE_THREADS) must be a whole number of at least 1, "
                                  f"not {bad!r}")
    with settings.applied(settings.Settings()):
        assert connections.thread_count() is None
