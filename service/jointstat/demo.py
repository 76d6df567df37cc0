"""``jointstat demo``: AES-128 garbled and evaluated in one process on invented data.

Theory of operation
-------------------
An invented scenario: a library (the garbler) keeps a secret AES-128 key with which it turns member
numbers into pseudonyms; a research partner (the evaluator) holds one 16-byte member record and wants its
pseudonym without learning the key, while the library learns nothing about the record. The demo builds the
AES-128 circuit (``aes128``), garbles it with half-gates, streams the garbled tables to the evaluator in small
chunks as they are made, evaluates, decodes, and prints the result beside AES-128 from the ``cryptography``
package on the same inputs. Both roles run in this one process and the evaluator's input labels are handed over
directly (a stand-in for oblivious transfer); the two-node demonstration replaces this when the node lands.

The exit code is 0 only if the garbled result equals ``cryptography``'s.
"""

from __future__ import annotations

import argparse
import time

from cryptography.hazmat.primitives.ciphers import Cipher, algorithms, modes

from jointstat.circuit.layers import schedule
from jointstat.circuit.model import GateKind, Party
from jointstat.circuit.reference.aes128 import aes128_circuit, bits_to_block, block_bits, key_bits
from jointstat.garble.local import run_locally

CHUNK_BYTES = 16 * 1024

# Invented demo data (not secret, not from anywhere).
LIBRARY_KEY = bytes.fromhex("3f8a1c52e7094bd6a1057e2c98d3b614")
MEMBER_RECORD = b"member-no 004217"


def reference_aes128(key: bytes, block: bytes) -> bytes:
    """AES-128 of one block by the ``cryptography`` package (ECB on a single block is the bare cipher)."""
    encryptor = Cipher(algorithms.AES(key), modes.ECB()).encryptor()
    return encryptor.update(block) + encryptor.finalize()


def run() -> int:
    """Run the demonstration and print its report; 0 if the garbled result matches ``cryptography``'s, else 1."""
    t0 = time.perf_counter()
    circuit = aes128_circuit()
    layered = schedule(circuit)
    t_build = time.perf_counter() - t0

    run = run_locally(layered, key_bits(LIBRARY_KEY), block_bits(MEMBER_RECORD), chunk_bytes=CHUNK_BYTES)
    garbled = bits_to_block(run.outputs[Party.EVALUATOR])
    table_bytes, chunks, t_garble, t_eval = (
        run.table_bytes,
        run.chunks,
        run.garble_seconds,
        run.evaluate_seconds,
    )
    expected = reference_aes128(LIBRARY_KEY, MEMBER_RECORD)
    match = garbled == expected

    print("jointstat demo: AES-128 as a garbled circuit, both parties in one process, invented data")
    print()
    print("  A library keeps a secret AES-128 key that turns member records into pseudonyms. A research")
    print("  partner holds one record and wants its pseudonym without learning the key; the library must")
    print("  learn nothing about the record. The library garbles; the partner evaluates.")
    print("  (Here the partner's input labels are handed over directly, standing in for oblivious transfer.)")
    print()
    print(
        f"  circuit         {circuit.and_count:,} AND   {circuit.count(GateKind.XOR):,} XOR"
        f"   {circuit.count(GateKind.NOT):,} NOT   {layered.n_layers:,} layers"
    )
    print(
        f"  garbled tables  {table_bytes:,} bytes, streamed in {chunks} chunks of at most {CHUNK_BYTES:,} bytes"
    )
    print(f"  time            build {t_build:.3f} s   garble {t_garble:.3f} s   evaluate {t_eval:.3f} s")
    print(f"  record          {MEMBER_RECORD.decode('ascii')!r}")
    print(f"  pseudonym       garbled circuit  {garbled.hex()}")
    print(f"                  cryptography     {expected.hex()}")
    print(f"  match           {'yes' if match else 'NO'}")
    return 0 if match else 1


def _run(args: argparse.Namespace) -> int:
    return run()


def add_commands(sub: argparse._SubParsersAction) -> None:
    demo = sub.add_parser("demo", help="run the demonstration on invented data")
    demo.set_defaults(handler=_run)
