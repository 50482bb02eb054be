"""Simulating a locked plan before its data exist (README, "Simulating the plan before the data").

`scenarios` reads and checks a scenarios file against the plan (the models of the plan's columns, the
null and the alternatives); `generate` draws one data set of a dataset's model.
"""
