"""One switch for the transformers library's progress bars and load reports."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator

__all__ = ["quiet_library"]


@contextlib.contextmanager
def quiet_library(*, reports: bool = False) -> Iterator[None]:
    """Hide transformers' progress bars (and, with `reports`, its load reports), restoring both after.

    The bars are one per load or save (one per test otherwise); the reports are notices such as the
    pooler weights a head keeps outside the backbone.
    """
    from transformers.utils import logging as hf_logging  # late: keeps the command line's start-up fast

    level, bars = hf_logging.get_verbosity(), hf_logging.is_progress_bar_enabled()
    hf_logging.disable_progress_bar()
    if reports:
        hf_logging.set_verbosity_error()
    try:
        yield
    finally:
        hf_logging.set_verbosity(level)
        if bars:
            hf_logging.enable_progress_bar()
