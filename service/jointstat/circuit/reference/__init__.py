"""Reference circuits with published known answers: AES-128 (FIPS 197) and the SHA-256 compression function
(FIPS 180-4), built with the lane-parallel builder.

They exercise the builder, the layer schedule and the garbling end to end against outside sources, and they are
the workload of the one-process ``jointstat demo``. Import the modules directly (``reference.aes128``,
``reference.sha256``); this package does not import them, so loading it stays cheap.
"""
