"""How many units a rehearsal's dummy data sets hold (rows, or pairs or clusters where the plan
declares them). A module of its own, so that the command line can name the default and check the
bounds of ``--units`` without importing the data stage (numpy, the plan schema) for every command."""

DEFAULT_UNITS = 40
MIN_UNITS, MAX_UNITS = 4, 1_000_000
