"""Shared pytest fixtures for timbrel's tests."""

from __future__ import annotations

from pathlib import Path

import pytest

# ============================================================================
# Spoken-word reference set (espeak-ng). See tests/speech_corpus.py.
#
# Tests that use these fixtures should carry ``@pytest.mark.speech``. Without
# espeak-ng they are skipped, unless TIMBREL_REQUIRE_SPEECH=1 is set (as on CI
# machines that install it), in which case they fail.
# ============================================================================

SPOKEN_WORDS_CACHE = Path(__file__).parent / ".cache" / "spoken_words"


@pytest.fixture(scope="session")
def espeak_ready() -> None:
    """Skip (or fail, under TIMBREL_REQUIRE_SPEECH=1) when espeak-ng cannot run."""
    from speech_corpus import skip_or_fail_without_espeak

    skip_or_fail_without_espeak()


@pytest.fixture(scope="session")
def spoken_words(espeak_ready: None) -> Path:
    """Path of the default spoken-word set's ``manifest.csv``, built once and cached.

    The set lives in ``tests/.cache/spoken_words`` and is reused across runs while
    its parameters and the espeak-ng version stay the same.
    """
    from speech_corpus import make_spoken_word_set

    return make_spoken_word_set(SPOKEN_WORDS_CACHE)


# ============================================================================
# End of the spoken-word block.
# ============================================================================
