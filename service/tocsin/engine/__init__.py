"""The trigger engine: pure, synchronous, numpy. No I/O, no clock, no asyncio.

Input: ordered, validated hit arrays and live intervals (:class:`Block`).
Output: :class:`Candidate` records. Live service, replay, tuning and follow-up
all call the same engine, so their results are identical for identical input.
"""
