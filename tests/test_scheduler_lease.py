"""The scheduler under a lease: a non-leader runs no epoch; an epoch whose lease was lost is rolled back."""

from __future__ import annotations

from sqlalchemy import func, select

from fusion.lease import RowLease
from fusion.models import Decision, Epoch
from fusion.scheduler import FusionScheduler


def _epochs(app):
    with app.extensions["occfuse.sessions"]() as s:
        return s.scalar(select(func.count()).select_from(Epoch)), s.scalar(select(func.count()).select_from(Decision))


def test_only_the_lease_holder_runs_epochs(app, net):
    engine = app.extensions["occfuse.engine"]
    other = RowLease(engine, 60.0)
    assert other.acquire()
    sched = FusionScheduler(app, lease=RowLease(engine, 60.0))
    sched.tick()
    assert sched.leading is False and _epochs(app) == (0, 0)
    other.release()
    sched.tick()
    assert sched.leading is True and _epochs(app) == (1, 4)  # one epoch, one decision per plan channel
    assert not other.acquire()  # and now the scheduler's lease keeps the other out


class _LostDuringEpoch:
    """A lease that is granted, then found gone at the fencing check (as after a stall past the TTL)."""

    kind, renew_s, holder = "test", 1.0, "test"

    def acquire(self, now=None):
        return True

    def holds(self, session, now=None):
        return False

    def release(self):
        pass


def test_epoch_is_rolled_back_when_the_lease_is_gone_at_commit(app, net):
    sched = FusionScheduler(app, lease=_LostDuringEpoch())
    sched.tick()
    assert _epochs(app) == (0, 0)  # nothing of the epoch was published
    assert sched.leading is False and sched.epochs == 0 and sched.last_error is None
