"""The rate-limited warnings shared by the daemon and the bridges."""

from __future__ import annotations

import logging

from daemon.logsetup import RateLimitedLog


def test_one_line_per_key_and_interval_with_the_count_held_back(caplog):
    logger = logging.getLogger("posteriord.test.ratelog")
    quiet = RateLimitedLog(logger, interval=3600.0, template="rejected model=%s reason=%s: %s")
    with caplog.at_level(logging.WARNING, logger=logger.name):
        assert quiet.warn("two", "bad_value", "x is nan")
        assert not quiet.warn("two", "bad_value", "x is nan")
        assert not quiet.warn("two", "bad_value", "x is nan")
        # another reason of the same model, and the same reason of another model: own lines
        assert quiet.warn("two", "future", "t too far ahead")
        assert quiet.warn("", "bad_value", "x is nan")
    assert [r.getMessage() for r in caplog.records] == [
        "rejected model=two reason=bad_value: x is nan",
        "rejected model=two reason=future: t too far ahead",
        "rejected model=- reason=bad_value: x is nan"]
    caplog.clear()
    # the next line let through says how many were held back (interval 0: every line)
    loud = RateLimitedLog(logger, interval=3600.0)
    with caplog.at_level(logging.WARNING, logger=logger.name):
        loud.warn("opc.tcp://h:4840", "connection", "refused")
        loud.warn("opc.tcp://h:4840", "connection", "refused")
        loud._interval = 0.0
        loud.warn("opc.tcp://h:4840", "connection", "refused")
        loud.warn("opc.tcp://h:4840", "connection", "refused")
    assert [r.getMessage() for r in caplog.records] == [
        "opc.tcp://h:4840: connection (refused)",
        "opc.tcp://h:4840: connection (refused) (1 more since the last report)",
        "opc.tcp://h:4840: connection (refused)"]


def test_free_form_lines_at_their_level(caplog):
    logger = logging.getLogger("posteriord.test.ratelog2")
    say = RateLimitedLog(logger, interval=3600.0)
    with caplog.at_level(logging.INFO, logger=logger.name):
        assert say(logging.INFO, ("ep", "refused"), "feed %s: %s", "tcp://a:1", "refused")
        assert not say(logging.INFO, ("ep", "refused"), "feed %s: %s", "tcp://a:1", "refused")
    assert [(r.levelno, r.getMessage()) for r in caplog.records] == [
        (logging.INFO, "feed tcp://a:1: refused")]
