"""The node: configuration, scheduled jobs, the job store, keys and secrets, and (later) the daemon itself.

This is the only layer that owns files, clocks and the network; the protocol layers below it are sans-I/O.
"""
