"""Errors a user can act on, and the exit codes the command line maps every outcome to."""

EXIT_OK = 0
EXIT_BUDGET = 1        # a budget or a release gate failed
EXIT_INPUT = 2         # bad input: recipe, data, arguments, a tampered artifact
EXIT_STEP = 3          # a step ran but could not produce an acceptable result (parity broken, every seed degenerate)
EXIT_INTERNAL = 4      # a bug: an exception nobody caught
EXIT_INTERRUPTED = 130  # Ctrl-C (128 + SIGINT, the shell's convention)


class UserError(Exception):
    """A mistake in the user's input. The message is one line naming the place, the value and what is allowed."""

    exit_code = EXIT_INPUT


class StepFailed(Exception):
    """A step ran but its result is not acceptable (parity broken, every seed degenerate...)."""

    exit_code = EXIT_STEP
