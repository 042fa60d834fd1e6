"""Exceptions of convwitness.

Every error a user can meet is one line that says what was expected, what came and
how to fix it. The classes only sort them; the wording is built where the error is
raised.
"""
from __future__ import annotations


class ConvWitnessError(Exception):
    """Base class of every error convwitness raises on purpose."""


class SpecError(ConvWitnessError, ValueError):
    """A geometry (ConvSpec) that cannot be computed, or a malformed field."""


class FormatError(ConvWitnessError, ValueError):
    """An unknown number format, or a format whose library is missing."""


class AdapterLoadError(ConvWitnessError):
    """An ``--adapter`` spec that does not name a usable implementation."""


class AdapterUnavailable(AdapterLoadError):
    """A built-in adapter whose library is not installed (verdict ``unavailable``)."""


class AdapterOutputError(ConvWitnessError):
    """An adapter returned something other than the contract promises."""

    def __init__(self, message: str, output: str = ""):
        super().__init__(message)
        self.output = output


class CaseFileError(ConvWitnessError):
    """A witness/case file that is corrupt, foreign or of another version."""


class AdapterRaised(ConvWitnessError):
    """The adapter raised an exception on a case it claims (verdict ``error``)."""

    def __init__(self, message: str, traceback_text: str = "", output: str = ""):
        super().__init__(message)
        self.traceback_text = traceback_text
        self.output = output


class AdapterCrashed(ConvWitnessError):
    """The adapter's process died (verdict ``crash``)."""

    def __init__(self, message: str, output: str = ""):
        super().__init__(message)
        self.output = output


class AdapterTimeout(ConvWitnessError):
    """An adapter call ran past its time limit (verdict ``timeout``)."""

    def __init__(self, message: str, output: str = ""):
        super().__init__(message)
        self.output = output
