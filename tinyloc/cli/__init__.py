"""Command-line interface. Each command group lives in its own ``cmd_<name>.py`` module.

A command module defines ``NAME`` (the command word), ``HELP`` (one line), and
``register(parser)`` which adds arguments or sub-commands to its argparse parser
and sets ``func`` defaults. Keep heavy imports (numba, OpenCV) inside the
functions so ``tinyloc --help`` stays fast.
"""
