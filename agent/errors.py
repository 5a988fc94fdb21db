"""Exception hierarchy and the exit codes the ``lethe`` command maps them to.

Every error carries enough context (file, key, value, what was expected) to be
read by someone who has not seen the code.  Exit codes are part of the CLI
contract and are documented in ``docs/cli.md``.
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_FAILURE = 1  # a check ran and reported failures (lint rule, verification)
EXIT_USAGE = 2  # bad command line (argparse uses 2 as well)
EXIT_DATA = 3  # bad input data: policy, raw file, answers file
EXIT_INTEGRITY = 4  # tamper evidence: signature, MAC, hash chain, AEAD tag
EXIT_STATE = 5  # the home is not in a state that allows this (locked, not enrolled)
EXIT_BUDGET = 6  # privacy budget or disclosure control refuses an export


class LetheError(Exception):
    """Base class; ``exit_code`` selects the process exit status."""

    exit_code = EXIT_FAILURE


class UsageError(LetheError):
    exit_code = EXIT_USAGE


class DataError(LetheError):
    """Input that does not meet its format or the policy."""

    exit_code = EXIT_DATA


class PolicyError(DataError):
    """A policy file that fails validation.

    The message always names the file and the dotted key.
    """

    def __init__(self, path, key: str, message: str):
        self.path = str(path)
        self.key = key
        super().__init__(f"{self.path}: [{key}] {message}")


class RejectedInput(DataError):
    """A raw inbox file that cannot be used; ``reason`` is a short stable code."""

    def __init__(self, path, reason: str, detail: str):
        self.path = str(path)
        self.reason = reason
        self.detail = detail
        super().__init__(f"{self.path}: rejected ({reason}): {detail}")


class IntegrityError(LetheError):
    """Evidence of tampering or corruption: never trust the data after this."""

    exit_code = EXIT_INTEGRITY


class StateError(LetheError):
    exit_code = EXIT_STATE


class BudgetError(LetheError):
    exit_code = EXIT_BUDGET
