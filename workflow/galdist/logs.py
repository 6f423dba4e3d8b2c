"""Logging for rule scripts: everything to the rule's log file, errors named clearly."""

from __future__ import annotations

import contextlib
import logging
import sys
import time


@contextlib.contextmanager
def logged(path: str, what: str):
    """Send logging to ``path``; log start, end and any error (then re-raise)."""
    handler = logging.FileHandler(path, mode="w", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger()
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    log = logging.getLogger("galdist")
    start = time.perf_counter()
    log.info("%s: start", what)
    try:
        yield log
    except Exception as exc:
        log.error("%s failed: %s: %s", what, type(exc).__name__, exc)
        print(f"galdist: {what} failed: {exc}", file=sys.stderr)
        raise
    else:
        log.info("%s: done in %.2f s", what, time.perf_counter() - start)
    finally:
        root.removeHandler(handler)
        handler.close()
