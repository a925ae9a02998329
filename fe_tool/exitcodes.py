"""Exit codes of every ``fe-tool`` command (documented in the README)."""
from __future__ import annotations

EXIT_OK = 0
EXIT_FLAGGED = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3
EXIT_INTERRUPTED = 130

EXIT_MEANINGS = {
    EXIT_OK: "ok: finished, no result flagged (check: every case passed)",
    EXIT_FLAGGED: "flagged: finished, but a result is flagged as untrustworthy (check: a case missed its reference)",
    EXIT_BAD_INPUT: "bad input: refused before computing (bad file, option, output path, busy results folder)",
    EXIT_INTERNAL: "internal error: an unexpected failure while computing (a bug, a crashed worker)",
    EXIT_INTERRUPTED: "interrupted (Ctrl-C / SIGINT)",
}
