"""policyc's error family: one base that carries its exit code and presents itself, one subclass per stage.

=================  ====================================================  =========
stage              error                                                 defined in
=================  ====================================================  =========
(base)             :class:`PolicycError`                                 ``policyc.runtime.errors``
runtime            :class:`ArtefactError`, :class:`InputError`           ``policyc.runtime.errors``
language           ``PolicyError`` (source, schema, check), with located  ``policyc.language.diagnostics``
                   diagnostics
evidence           :class:`DataError`, :class:`FitProblem`               here
compiler           ``CompileError``, with located diagnostics            ``policyc.language.diagnostics``
review             :class:`ReviewError` (``PlotError`` for pictures)     here
(any output)       :class:`OutputError`                                  here
=================  ====================================================  =========

The command line catches :class:`PolicycError` in one place, prints :meth:`~PolicycError.as_text` (or
:meth:`~PolicycError.as_json` with ``--format json``) on standard error and exits with ``exit_code``:
1 for a policy, data, rule or input that cannot be used; ``policyc diff`` exits 2 instead ("trouble",
beside 0 every gate passes and 1 a gate failed). Usage errors exit 2 (click).
"""

from __future__ import annotations

from collections.abc import Sequence

from policyc.runtime.errors import ArtefactError, InputError, PolicycError

__all__ = ["ArtefactError", "DataError", "FitProblem", "InputError", "OutputError", "PolicycError", "ReviewError"]


class DataError(PolicycError, ValueError):
    """A data file cannot be used as asked; the message names the file, column and row."""

    stage = "evidence"


class FitProblem(PolicycError, ValueError):
    """The data cannot support the requested evidence model.

    ``code`` is a diagnostic code and ``path`` the policy key the compiler locates it at (``hint`` says what
    to do), so the compiler turns every fit problem into a located diagnostic without knowing the codes.
    """

    stage = "evidence"

    def __init__(
        self, code: str, message: str, hint: str | None = None, path: Sequence[str | int] = ("evidence",)
    ) -> None:
        super().__init__(message)
        self.code, self.hint, self.path = code, hint, tuple(path)

    def __reduce__(self) -> tuple[type[FitProblem], tuple[str, str, str | None, tuple[str | int, ...]]]:
        # raised on a Dask worker, it is pickled back to the client: rebuild it with every field
        return FitProblem, (self.code, self.message, self.hint, self.path)

    def as_json(self) -> dict[str, object]:
        return {**super().as_json(), "code": self.code, "hint": self.hint}


class OutputError(PolicycError, ValueError):
    """A file cannot be written where asked (its directory does not exist, ...); nothing was written."""

    stage = "files"


class ReviewError(PolicycError, ValueError):
    """A review tool (diff, evaluate, priors, plot, inspect) cannot do what was asked."""

    stage = "review"
