"""Pure calibration statistics: arrays in, numbers out.

Nothing in this package touches a database, a clock, a file or the network.
"""
