"""The failures depthplan names (errors.py): exit statuses and the one-line helper.

The statuses are this project's CLI contract (DEVELOPERS.md, "Conventions"): 2 for the user's
input and the store, 1 for a failure that is not the user's; the CLI's use of them: tests/test_cli.py.
"""
from __future__ import annotations

import pytest

from depthplan.errors import ConfigError, DataError, DepthplanError, RunFailed, StoreError, first_line


@pytest.mark.parametrize("kind, code", [(DepthplanError, 1), (ConfigError, 2), (DataError, 2), (StoreError, 2),
                                        (RunFailed, 1)])
def test_every_error_carries_its_exit_status(kind, code) -> None:
    assert issubclass(kind, DepthplanError) and kind("x").exit_code == code


def test_a_data_error_is_caught_as_a_config_error() -> None:
    # a bad data file is bad input: whoever refuses a config also refuses the data it names
    with pytest.raises(ConfigError):
        raise DataError("data.path: not found")
    assert not issubclass(StoreError, ConfigError) and not issubclass(RunFailed, ConfigError)


@pytest.mark.parametrize("text, line", [
    ("one line", "one line"), ("  padded  \n", "padded"), ("\n\nfirst\nsecond", "first"),
    ("", ""), (" \n \t", ""),
])
def test_first_line(text, line) -> None:
    assert first_line(text) == line
