"""A resent command never overtakes a newer one for the same output (found on the simulated
board with damaged lines: a lost `set 1 1` resent after the `set 1 0` that followed it left
the lever extended)."""

from __future__ import annotations

from server.link.messages import DriveCommand, PulseCommand, QueryCommand
from server.link.pending import PendingCommands


def test_a_newer_set_replaces_older_sets_and_pulses_on_its_channel_only():
    pending = PendingCommands(1)
    for command in (DriveCommand(1, 1, True), PulseCommand(2, 1, 30), DriveCommand(3, 2, True),
                    QueryCommand(4, "beat")):  # fmt: skip
        pending.sent(command, 0.0)
    stale = pending.supersede(DriveCommand(5, 1, False))
    assert [p.command.command_id for p in stale] == [1, 2]
    assert 3 in pending and 4 in pending and len(pending) == 2


def test_a_newer_pulse_replaces_a_set_but_not_another_pulse():
    pending = PendingCommands(1)
    pending.sent(DriveCommand(1, 7, True), 0.0)
    pending.sent(PulseCommand(2, 7, 30), 0.0)
    stale = pending.supersede(PulseCommand(3, 7, 30))
    assert [p.command.command_id for p in stale] == [1]
    assert 2 in pending  # a pellet the session counted is still owed
    # Nothing superseded is resent.
    assert [c.command_id for c in pending.due(1.0).resend] == [2]


def test_a_pulse_waits_for_the_earlier_pulse_on_its_output_to_end():
    # Two pellets 0.4 s apart whose first line is damaged and resent must not reach the
    # device 10 ms apart: the second would only restart the first (PROTOCOL.md section 4).
    from server.link.codec import Decoder, encode
    from server.link.host_side import HostSide
    from server.link.messages import Ack, Identity

    side = HostSide(first_id=10)
    side.receive(encode(Identity(0, "t", 1, 1, (), ())), 0.0)
    first = side.pulse(7, 30, 0.0)
    assert first is not None
    side.take_output()
    assert side.pulse(7, 30, 0.4) is None  # the first is not acknowledged yet: held
    assert Decoder("host").feed(side.take_output()) == []
    side.receive(encode(Ack(0, first.command_id, "ok", 5, 0)), 0.41)
    assert Decoder("host").feed(side.take_output()) == []  # the first is still on until 0.44
    side.poll(0.45)
    (second,) = [m for m in Decoder("host").feed(side.take_output()) if isinstance(m, PulseCommand)]
    assert second.channel == 7 and side.next_deadline() < float("inf")
