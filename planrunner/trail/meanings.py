"""What a signature can mean, in a module of its own: the command line offers these choices
without importing the signing code (and with it numpy) for every command."""

MEANINGS = ("authored", "reviewed", "approved", "executed")
