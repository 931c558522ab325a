"""Published formulas as pure functions of numbers and arrays.

Inputs and outputs carry their unit in their names. No DataFrames here.
"""
