"""A table stream and the threads that drive it: nothing of a calling thread is kept once the call returns.

Specification: the driver runs each session on a worker thread that ends with the session, and the collector must
never meet a greenlet of a thread that has ended (the ``greenlet`` package can crash when its collection hook
visits one: a 10,000-case fuzzing run died with SIGSEGV in ``green_is_gc`` while the streams kept their caller's
greenlet). So between calls a ``TableProducer`` or ``TableConsumer`` holds no greenlet but its own program's — and
none at all once the program has finished or been stopped — whichever thread called it.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

from greenlet import greenlet
from jointstat.garble.streams import Sink, Source, TableConsumer, TableProducer


def greenlets_held(obj: object) -> list[greenlet]:
    return [v for v in vars(obj).values() if isinstance(v, greenlet)]


def on_a_thread_that_then_ends(fn: Callable[[], object]) -> None:
    with ThreadPoolExecutor(max_workers=1) as worker:
        worker.submit(fn).result()


def garble_three_chunks(sink: Sink) -> str:
    for i in range(3):
        sink(memoryview(bytes([i]) * 32))
    return "garbled"


def evaluate_96_bytes(source: Source) -> str:
    for _ in range(3):
        assert len(source(32)) == 32
    return "evaluated"


def test_a_producer_holds_no_greenlet_of_its_callers_thread_between_calls_or_after_the_end() -> None:
    producer = TableProducer(garble_three_chunks)
    with ThreadPoolExecutor(
        max_workers=1
    ) as worker:  # one thread drives a stream, as the driver's worker does
        worker.submit(producer.next_chunk).result()
        assert greenlets_held(producer) == [producer._glet]  # paused in its program, nothing of the caller
        worker.submit(lambda: [producer.next_chunk() for _ in range(3)]).result()
    assert producer.finished and producer.result == "garbled"
    assert greenlets_held(producer) == []


def test_a_consumer_holds_no_greenlet_of_its_callers_thread_between_calls_or_after_the_end() -> None:
    consumer = TableConsumer(evaluate_96_bytes, total=96)
    with ThreadPoolExecutor(max_workers=1) as worker:
        worker.submit(lambda: (consumer.start(), consumer.feed(bytes(40)))).result()
        assert greenlets_held(consumer) == [consumer._glet]
        worker.submit(consumer.feed, bytes(56)).result()
    assert consumer.finished and consumer.result == "evaluated"
    assert greenlets_held(consumer) == []


def test_a_stream_stopped_mid_way_holds_no_greenlet() -> None:
    producer = TableProducer(garble_three_chunks)
    consumer = TableConsumer(evaluate_96_bytes, total=96)

    def start_and_stop() -> None:
        producer.next_chunk()
        consumer.start()
        consumer.feed(bytes(40))
        producer.close()
        consumer.close_quietly()

    on_a_thread_that_then_ends(start_and_stop)
    assert greenlets_held(producer) == greenlets_held(consumer) == []
