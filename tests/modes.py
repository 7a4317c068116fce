"""File modes under a chosen umask, for the privacy tests: import `any_umask` into a test module
to run its tests under umask 000 (nothing masked) and 022 (the usual default)."""
import os
import stat

import pytest


@pytest.fixture(params=[0o000, 0o022], ids=lambda m: f"umask{m:03o}")
def any_umask(request):
    old = os.umask(request.param)
    try:
        yield request.param
    finally:
        os.umask(old)


def mode(path) -> int:
    """The permission bits of `path` (e.g. 0o600)."""
    return stat.S_IMODE(os.stat(path).st_mode)
