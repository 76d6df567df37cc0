"""Harnesses that tests and benchmarks use to put real node processes under real conditions.

A harness may import anything below ``node``; nothing imports a harness except the tests, ``bench/`` and the CLI.
``link`` is a wide-area link emulator in user space: a loopback TCP proxy with a rate, a one-way delay and a
bounded queue in each direction, that can cut its connections on a schedule or on demand.
"""
