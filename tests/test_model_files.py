"""Model directories: written with the mode the umask gives a new folder (not 0700)."""

from __future__ import annotations

import os
import stat

import numpy as np

from cascade.models.model_files import save_model_dir


def test_model_directory_mode_follows_the_umask(tmp_path) -> None:
    old = os.umask(0o027)
    try:
        path = save_model_dir(tmp_path / "m", "test-kind", {}, {"a": np.zeros(3)})
    finally:
        os.umask(old)
    # POSIX: a new directory's mode is 0777 minus the umask bits
    assert stat.S_IMODE(path.stat().st_mode) == 0o750
    assert all(stat.S_IMODE(f.stat().st_mode) == 0o640 for f in path.iterdir())
