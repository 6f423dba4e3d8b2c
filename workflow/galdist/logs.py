"""Logging for rule scripts: everything to the rule's log file, errors named clearly."""

from __future__ import annotations

import contextlib
import logging
import sys
import time

from .errors import STRUCTURAL


@contextlib.contextmanager
def logged(path: str, what: str):
    """Send logging to ``path``; log start, end and any error.

    Errors that name a problem with the user's files or settings (the STRUCTURAL
    exceptions) end the job with their message alone; anything else is a bug in
    galdist and keeps its traceback.
    """
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
    except STRUCTURAL as exc:
        # a problem with the user's data or config, named in the message: no traceback
        log.error("%s failed: %s", what, exc)
        print(f"galdist: {what} failed: {exc}", file=sys.stderr)
        raise SystemExit(1) from None
    except Exception as exc:
        log.exception("%s failed: %s: %s", what, type(exc).__name__, exc)
        print(f"galdist: {what} failed: {exc}", file=sys.stderr)
        raise
    else:
        log.info("%s: done in %.2f s", what, time.perf_counter() - start)
    finally:
        root.removeHandler(handler)
        handler.close()
