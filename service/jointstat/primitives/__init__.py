"""Symmetric and group primitives shared by garbling and oblivious transfer.

Nothing here touches a socket, a clock or a file; randomness comes from the operating system's CSPRNG.
"""
