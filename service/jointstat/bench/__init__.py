"""Benchmarks behind ``jointstat bench …``: each measures one layer on this machine and reports JSON figures.

Every figure printed is measured in the same run; nothing is estimated or copied from elsewhere.
"""
