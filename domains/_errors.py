"""The project's exception types: bad input is a ValueError the command line turns into exit status 2."""


class InputError(ValueError):
    """Bad input: a file, an argument or a configuration value that cannot be used.

    The message names the file or argument and the problem; the command line
    prints it on one line and exits with status 2.
    """
