"""Error types the CLI turns into exit codes (SPEC section 9)."""

from __future__ import annotations


class InputError(ValueError):
    """Bad input or configuration: the CLI prints the message (no traceback) and exits 2.

    The message names what is wrong, where (file, frame index, config key) and what would be
    accepted, in one or two lines.
    """


EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_BAD_INPUT = 2
EXIT_INTERRUPTED = 130
