"""The [compute] section: defaults, and one-line errors for an unknown key or a scheduler
that is neither "local" nor an address."""

from __future__ import annotations

from collections.abc import Callable

import pytest

from monitor.config import ComputeSettings, Settings
from monitor.errors import ConfigError


def test_defaults_keep_the_local_engine(write_settings: Callable[..., Settings]) -> None:
    settings = write_settings("sqlite:///x.db")
    assert settings.compute == ComputeSettings()
    assert settings.compute.engine == "local"


def test_address_and_sizes_are_read(write_settings: Callable[..., Settings]) -> None:
    settings = write_settings("sqlite:///x.db", extra='[compute]\nengine = "dask"\n'
                              'scheduler = "tcp://10.1.2.3:8786"\ntile_size = 256\n')
    assert settings.compute.scheduler == "tcp://10.1.2.3:8786"
    assert settings.compute.tile_size == 256


@pytest.mark.parametrize(("body", "named"), [
    ('[compute]\nworker = 4\n', "worker"),
    ('[compute]\nengine = "spark"\n', "spark"),
    ('[compute]\nscheduler = "host:8786"\n', "host:8786"),
    ('[compute]\ntile_size = 1\n', "tile_size"),
])
def test_bad_compute_keys_are_one_line_errors(write_settings: Callable[..., Settings],
                                              body: str, named: str) -> None:
    with pytest.raises(ConfigError) as caught:
        write_settings("sqlite:///x.db", extra=body)
    message = str(caught.value)
    assert "compute" in message and named in message
    assert "\n" not in message.strip(), message
