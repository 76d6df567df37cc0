"""AES-128 encryption (FIPS 197) as a program, key expansion included, with the Boyar–Peralta S-box.

Theory of operation
-------------------
``aes128_program`` has the garbler's 128-bit key as its garbler input, the evaluator's 128-bit plaintext block
as its evaluator input and the 128-bit ciphertext as the evaluator's output. Bit order (all three vectors): bit
8i + j of the vector is bit j, least significant first, of byte i, and the bytes are in FIPS 197 order
(in0 … in15 of §3.4, the key bytes as listed in Appendix A.1). ``key_bits``, ``block_bits`` and
``bits_to_block`` convert; they are ``np.unpackbits``/``np.packbits`` with ``bitorder="little"``.

Inside, the state is a (…, 16, 8) array of bits, byte r + 4c holding row r and column c (FIPS 197 §3.4), bits
LSB-first; leading axes are lanes, so ``aes128_encrypt`` also encrypts many blocks under many keys in one call.

- SubBytes is the small S-box circuit of Boyar and Peralta ("A new combinational logic minimization technique
  with applications to cryptology", SEA 2010; title and year from memory): a linear top layer (23 XOR), a
  non-linear middle that inverts in the tower field (14 AND, 30 XOR), 18 AND gates of output products and a
  linear bottom layer (26 XOR, 4 XNOR) — 115 gates, 32 of them AND. The netlist below was written down from
  memory; the tests verify it on all 256 inputs against the S-box computed from the GF(2^8) inverse and the
  affine map of FIPS 197 §5.1.1. The netlist runs once per round over all the bytes that need an S-box in that
  round at once: the 16 state bytes and the 4 bytes of the rotated key word, 20 lanes, so each of its 115 gates
  is one builder call emitting 20 gates.
- ShiftRows is a permutation of the byte axis (free); MixColumns and AddRoundKey are XOR only: per column,
  s'_r = a_r ⊕ (a_0 ⊕ a_1 ⊕ a_2 ⊕ a_3) ⊕ xtime(a_r ⊕ a_{r+1}) (FIPS 197 §5.1.3 rearranged), and xtime (§4.2.1)
  is a rewiring plus three XORs.
- Key expansion (FIPS 197 §5.2) runs alongside the rounds: round key r is made, from round key r − 1, in the
  same S-box call as round r's SubBytes. Rcon is a public constant, so adding it folds into NOT gates.

Size: 10 rounds × (16 + 4) S-boxes × 32 AND = 6,400 AND gates, and nothing else costs an AND. The figure
commonly cited for AES-128 with key expansion under free XOR using a 32-AND S-box is about 6,400 AND gates
(from memory) — the same construction, so the same count; with Boyar and Peralta's later depth-16 S-box of
34 AND gates (2012, from memory) it would be 6,800. The tests assert the exact count.
"""

from __future__ import annotations

import numpy as np

from jointstat.circuit.bits import Bits, broadcast, concat, stack
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import CircuitError, Party
from jointstat.circuit.reference._bytes import bits_to_bytes, bytes_to_bits

KEY_BYTES = 16
BLOCK_BYTES = 16
ROUNDS = 10
SBOX_AND_GATES = 32
AND_GATES = ROUNDS * (BLOCK_BYTES + 4) * SBOX_AND_GATES  # 6,400

# Boyar–Peralta forward S-box. Inputs x0 (most significant bit of the byte) … x7 (least significant), outputs
# s0 (most significant) … s7. One gate per entry: "dest = a OP b" with OP one of XOR, AND, XNOR.
SBOX_NETLIST = """
    y14 = x3 XOR x5; y13 = x0 XOR x6; y9 = x0 XOR x3; y8 = x0 XOR x5; t0 = x1 XOR x2; y1 = t0 XOR x7
    y4 = y1 XOR x3; y12 = y13 XOR y14; y2 = y1 XOR x0; y5 = y1 XOR x6; y3 = y5 XOR y8; t1 = x4 XOR y12
    y15 = t1 XOR x5; y20 = t1 XOR x1; y6 = y15 XOR x7; y10 = y15 XOR t0; y11 = y20 XOR y9; y7 = x7 XOR y11
    y17 = y10 XOR y11; y19 = y10 XOR y8; y16 = t0 XOR y11; y21 = y13 XOR y16; y18 = x0 XOR y16

    t2 = y12 AND y15; t3 = y3 AND y6; t4 = t3 XOR t2; t5 = y4 AND x7; t6 = t5 XOR t2; t7 = y13 AND y16
    t8 = y5 AND y1; t9 = t8 XOR t7; t10 = y2 AND y7; t11 = t10 XOR t7; t12 = y9 AND y11; t13 = y14 AND y17
    t14 = t13 XOR t12; t15 = y8 AND y10; t16 = t15 XOR t12; t17 = t4 XOR t14; t18 = t6 XOR t16; t19 = t9 XOR t14
    t20 = t11 XOR t16; t21 = t17 XOR y20; t22 = t18 XOR y19; t23 = t19 XOR y21; t24 = t20 XOR y18
    t25 = t21 XOR t22; t26 = t21 AND t23; t27 = t24 XOR t26; t28 = t25 AND t27; t29 = t28 XOR t22
    t30 = t23 XOR t24; t31 = t22 XOR t26; t32 = t31 AND t30; t33 = t32 XOR t24; t34 = t23 XOR t33
    t35 = t27 XOR t33; t36 = t24 AND t35; t37 = t36 XOR t34; t38 = t27 XOR t36; t39 = t29 AND t38
    t40 = t25 XOR t39; t41 = t40 XOR t37; t42 = t29 XOR t33; t43 = t29 XOR t40; t44 = t33 XOR t37
    t45 = t42 XOR t41

    z0 = t44 AND y15; z1 = t37 AND y6; z2 = t33 AND x7; z3 = t43 AND y16; z4 = t40 AND y1; z5 = t29 AND y7
    z6 = t42 AND y11; z7 = t45 AND y17; z8 = t41 AND y10; z9 = t44 AND y12; z10 = t37 AND y3; z11 = t33 AND y4
    z12 = t43 AND y13; z13 = t40 AND y5; z14 = t29 AND y2; z15 = t42 AND y9; z16 = t45 AND y14; z17 = t41 AND y8

    t46 = z15 XOR z16; t47 = z10 XOR z11; t48 = z5 XOR z13; t49 = z9 XOR z10; t50 = z2 XOR z12; t51 = z2 XOR z5
    t52 = z7 XOR z8; t53 = z0 XOR z3; t54 = z6 XOR z7; t55 = z16 XOR z17; t56 = z12 XOR t48; t57 = t50 XOR t53
    t58 = z4 XOR t46; t59 = z3 XOR t54; t60 = t46 XOR t57; t61 = z14 XOR t57; t62 = t52 XOR t58; t63 = t49 XOR t58
    t64 = z4 XOR t59; t65 = t61 XOR t62; t66 = z1 XOR t63; s0 = t59 XOR t63; s6 = t56 XNOR t62; s7 = t48 XNOR t60
    t67 = t64 XOR t65; s3 = t53 XOR t66; s4 = t51 XOR t66; s5 = t47 XOR t65; s1 = t64 XNOR s3; s2 = t55 XNOR t67
"""

_OPS = ("XOR", "AND", "XNOR")


def _parse_netlist(text: str) -> tuple[tuple[str, str, str, str], ...]:
    """The netlist as (dest, op, a, b) in order; checks every operand is defined before it is read."""
    gates: list[tuple[str, str, str, str]] = []
    defined = {f"x{k}" for k in range(8)}
    for n, entry in enumerate(e.strip() for e in text.replace("\n", ";").split(";")):
        if not entry:
            continue
        parts = entry.split()
        if len(parts) != 5 or parts[1] != "=" or parts[3] not in _OPS:
            raise CircuitError(f"S-box netlist entry {n}: expected 'dest = a OP b', got {entry!r}")
        dest, _, a, op, b = parts
        for operand in (a, b):
            if operand not in defined:
                raise CircuitError(f"S-box netlist entry {n}: {operand} is read before it is defined")
        if dest in defined:
            raise CircuitError(f"S-box netlist entry {n}: {dest} is defined twice")
        defined.add(dest)
        gates.append((dest, op, a, b))
    missing = [f"s{k}" for k in range(8) if f"s{k}" not in defined]
    if missing:
        raise CircuitError(f"S-box netlist: outputs {', '.join(missing)} are never defined")
    return tuple(gates)


_SBOX_GATES = _parse_netlist(SBOX_NETLIST)

# FIPS 197 §5.2: Rcon[i] = x^(i−1) in GF(2^8), i = 1 … 10.
_RCON = (0x01, 0x02, 0x04, 0x08, 0x10, 0x20, 0x40, 0x80, 0x1B, 0x36)

# ShiftRows (FIPS 197 §5.1.2): s'[r, c] = s[r, (c + r) mod 4], byte index r + 4c.
_SHIFT_ROWS = np.array([(i % 4) + 4 * ((i // 4 + i % 4) % 4) for i in range(16)], dtype=np.int64)


def sub_bytes(bld: Builder, data: Bits) -> Bits:
    """The AES S-box on every byte of ``data`` (bits of shape (…, 8), LSB-first) at once.

    Runs the Boyar–Peralta netlist once, each gate over all the bytes: 32 AND gates per byte.
    """
    arr = data
    if arr.ndim == 0 or arr.shape[-1] != 8:
        raise CircuitError(f"AES S-box: expected bytes of 8 bits on the last axis, got shape {arr.shape}")
    env: dict[str, Bits] = {f"x{k}": arr[..., 7 - k] for k in range(8)}
    for dest, op, a, b in _SBOX_GATES:
        if op == "AND":
            env[dest] = bld.and_(env[a], env[b])
        elif op == "XOR":
            env[dest] = bld.xor(env[a], env[b])
        else:
            env[dest] = bld.not_(bld.xor(env[a], env[b]))
    return stack([env[f"s{7 - j}"] for j in range(8)], axis=-1)


def _xtime(bld: Builder, b: Bits) -> Bits:
    """Multiplication by x = {02} in GF(2^8) (FIPS 197 §4.2.1) on LSB-first bits: shift up, reduce by {1b}."""
    top = b[..., 7:8]
    # Shifted up by one, the old top bit wraps to bit 0 and is also XORed into bits 1, 3 and 4 ({1b}).
    return concat(
        [top, bld.xor(b[..., 0:1], top), b[..., 1:2], bld.xor(b[..., 2:4], top), b[..., 4:7]], axis=-1
    )


def _mix_columns(bld: Builder, state: Bits) -> Bits:
    """MixColumns (FIPS 197 §5.1.3): s'_r = a_r ⊕ (a_0 ⊕ a_1 ⊕ a_2 ⊕ a_3) ⊕ xtime(a_r ⊕ a_{r+1}), XOR only."""
    cols = state.reshape(*state.shape[:-2], 4, 4, 8)  # (…, column, row, bit)
    total = bld.reduce_xor(cols.moveaxis(-2, -1), axis=-1)[..., None, :]  # (…, column, 1, bit)
    pair = bld.xor(cols, cols.roll(-1, axis=-2))
    mixed = bld.xor(bld.xor(cols, total), _xtime(bld, pair))
    return mixed.reshape(state.shape)


def aes128_encrypt(bld: Builder, key: Bits, block: Bits) -> Bits:
    """AES-128 encryption of ``block`` under ``key`` (both bits of shape (…, 16, 8), broadcast together).

    Key expansion happens inside; returns the ciphertext as bits of the broadcast shape.
    """
    key_arr, block_arr = broadcast(key, block)
    if key_arr.ndim < 2 or key_arr.shape[-2:] != (16, 8):
        raise CircuitError(f"AES-128: key and block must be bits of shape (…, 16, 8), got {key_arr.shape}")
    lanes = key_arr.shape[:-2]
    words = key_arr.reshape(*lanes, 4, 4, 8)  # round key as 4 words of 4 bytes (FIPS 197 §5.2)
    state = bld.xor(block_arr, key_arr)
    for r in range(1, ROUNDS + 1):
        rot_word = words[..., 3, :, :].roll(-1, axis=-2)  # RotWord
        boxed = sub_bytes(bld, concat([state, rot_word], axis=-2))
        state, temp = boxed[..., :16, :], boxed[..., 16:, :]
        rcon = bld.constant([(_RCON[r - 1] >> j) & 1 for j in range(8)])
        temp = concat([bld.xor(temp[..., 0:1, :], rcon), temp[..., 1:, :]], axis=-2)
        new_words = []
        for i in range(4):
            temp = bld.xor(words[..., i, :, :], temp)
            new_words.append(temp)
        words = stack(new_words, axis=-3)
        state = state[..., _SHIFT_ROWS, :]
        if r < ROUNDS:
            state = _mix_columns(bld, state)
        state = bld.xor(state, words.reshape(*lanes, 16, 8))
    return state


def aes128_program(bld: Builder) -> None:
    """AES-128: garbler input the key, evaluator input the plaintext, evaluator output the ciphertext.

    Each is 128 bits in the order of the module docstring (``key_bits``, ``block_bits``, ``bits_to_block``).
    """
    key = bld.input(Party.GARBLER, (KEY_BYTES, 8))
    block = bld.input(Party.EVALUATOR, (BLOCK_BYTES, 8))
    bld.output(Party.EVALUATOR, aes128_encrypt(bld, key, block))


def key_bits(key: bytes) -> np.ndarray:
    """A 16-byte AES-128 key as the circuit's 128 garbler input bits."""
    return bytes_to_bits(key, KEY_BYTES, "AES-128 key")


def block_bits(data: bytes) -> np.ndarray:
    """A 16-byte block as 128 input bits (the evaluator's plaintext)."""
    return bytes_to_bits(data, BLOCK_BYTES, "AES block")


def bits_to_block(bits: object) -> bytes:
    """128 output bits (the ciphertext) back to a 16-byte block."""
    return bits_to_bytes(bits, BLOCK_BYTES, "AES block")
