"""The commands: one module per ``crustflow`` command, each a function that does the work and
returns what the command line prints (``cli.py`` only parses arguments, prints and sets exit codes).

Modules here may import heavy parts of the package inside functions, for start-up time only: a run
without budgets, figure or ensemble never loads them.
"""
