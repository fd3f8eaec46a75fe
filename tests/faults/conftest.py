"""Fixtures shared by the fault suite's crash and stop tests."""

from __future__ import annotations

import pytest
from _faultkit import EXPORT_OPTIONS, FIT_OPTIONS, N_GOOD, SETTINGS, invoke, write_good_clips


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """Uninterrupted runs over 20 good clips and one bad file."""
    root = tmp_path_factory.mktemp("reference")
    audio = root / "audio"
    write_good_clips(audio, N_GOOD, seconds=0.3)
    (audio / "zz_broken.wav").write_bytes(b"RIFF not really")
    assert invoke("frames", audio, "--out", root / "cache", "-q", "-j", "1",
                  *SETTINGS).exit_code == 0
    assert invoke("fit", root / "cache", "--out", root / "model.npz", "-q",
                  *FIT_OPTIONS).exit_code == 0
    assert invoke("export", audio, "--model", root / "model.npz", "--out", root / "ds", "-q",
                  "-j", "1", *EXPORT_OPTIONS).exit_code == 0
    return root
