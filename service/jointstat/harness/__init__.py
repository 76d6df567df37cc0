"""Harnesses that tests and benchmarks use to put a real node under real conditions.

A harness may import anything (``node`` included); nothing imports a harness except the tests, ``bench/`` and the
CLI. The fault harness is in rooms of one job each: ``scenario`` (the invented job both nodes run), ``recording``
(sessions that hand the harness their secrets), ``scanner`` (every form of those secrets searched for in logs),
``proxy`` (a loopback TCP proxy that cuts or stalls), ``faultpoint`` (a fault fired at a planned frame of a
stream), ``outcome`` (how one side of a session ended), ``watch`` (what escaped: exceptions, errors logged),
``peer`` (the stand-in peer node), ``peer_process`` (that peer in a process of its own, for the kill fault),
``campaign`` (a node under test through faulted sessions and their retries), ``verdicts`` (judging them),
``identities`` (throw-away node identities), ``mutations`` (mutated frames) and ``fuzzer`` (mutated frames sent to
a node's session server). ``link`` is a wide-area link emulator in user space: a loopback TCP proxy with a rate, a
one-way delay and a bounded queue in each direction, that can cut its connections on a schedule or on demand.
"""
