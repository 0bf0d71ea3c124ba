"""Error types shared by every layer.

`InputError` carries one line per problem so that the command line can print each
on its own line and exit with code 2; `EstimationError` marks a model that cannot be
estimated on its data (an audit records it as a failed variant and goes on).
"""
from __future__ import annotations


class InputError(Exception):
    """Bad user input: one or more one-line problems, each naming its culprit."""

    def __init__(self, problems):
        if isinstance(problems, str):
            problems = [problems]
        self.problems = [str(p) for p in problems]
        super().__init__("\n".join(self.problems))


class EstimationError(Exception):
    """A model that cannot be estimated on the data it was given."""


class UnderidentifiedError(EstimationError):
    """Fewer instruments than parameters (or too few observations): nothing to estimate."""


class RankConditionError(UnderidentifiedError):
    """Enough instruments, but a term that no instrument moves (rank of Z'X below the
    number of parameters): only the data show it, so in an audit the variant fails."""


class DataWarning(UserWarning):
    """Something in the data that robustgmm handled in a stated way but the user
    should know about (one line naming an example); the command line prints it as
    ``robustgmm: warning: ...``."""
