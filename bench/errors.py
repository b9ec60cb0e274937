"""One base exception for expected failures, and the exit codes the command line returns."""

from __future__ import annotations

EXIT_OK = 0
EXIT_WORSE = 1  # a comparison found a figure lost (diff, trend, gate, survey --check)
EXIT_INPUT = 2  # bad input: arguments, files, sizes
EXIT_STORE = 3  # the store cannot be opened, read or reached
EXIT_BROKEN = 4  # a survey step gave no figure: hung, crashed, wrong checksum or above the physical bound
EXIT_INTERRUPTED = 130


class EavesError(Exception):
    """An expected failure: the CLI prints its message on one line and exits with `exit_code`."""

    exit_code = EXIT_INPUT

    def __init__(self, message: str, exit_code: int | None = None):
        super().__init__(message)
        if exit_code is not None:
            self.exit_code = exit_code


class InputError(EavesError):
    """Bad arguments or a bad file; the message names the file, line and field where it can."""

    exit_code = EXIT_INPUT


class StoreError(EavesError):
    """The store cannot be opened, read, migrated or reached."""

    exit_code = EXIT_STORE


class BrokenKernelError(EavesError):
    """A kernel returned a wrong checksum or a rate above the host's physical bound."""

    exit_code = EXIT_BROKEN
