"""Errors a user can act on, and the exit codes the command line maps them to."""

EXIT_OK = 0
EXIT_BUDGET = 1     # a budget or a release gate failed
EXIT_INPUT = 2      # bad input: recipe, data, arguments, a tampered artifact
EXIT_INTERNAL = 3   # a bug or an environment problem we did not foresee


class UserError(Exception):
    """A mistake in the user's input. The message is one line naming the place, the value and what is allowed."""

    exit_code = EXIT_INPUT


class StepFailed(Exception):
    """A step ran but its result is not acceptable (parity broken, every seed degenerate...)."""

    exit_code = EXIT_INTERNAL
