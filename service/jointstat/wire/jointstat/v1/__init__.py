"""Generated protobuf modules of the wire format (see proto/generate.py); do not edit by hand."""
