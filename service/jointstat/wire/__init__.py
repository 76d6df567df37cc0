"""The wire format's message code, generated from ``proto/jointstat/v1/*.proto`` by ``proto/generate.py``.

A room of its own at the bottom of the house: the protocol (frames, sessions) and the transport both import it, and
it imports nothing of jointstat. Do not edit the generated modules by hand; edit the .proto files and regenerate.
"""
