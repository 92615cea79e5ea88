"""Several workers seeding the fusion settings of a new database at once: one insert wins, none fails."""

from __future__ import annotations

import threading
import time

from fusion.settings import get_settings


def test_concurrent_seeding_of_the_settings_row(app):
    sessions = app.extensions["occfuse.sessions"]
    first = sessions()
    first.begin()
    get_settings(first, app.config)  # inserted, not yet committed: the other worker must wait, then find it
    got, errors = [], []

    def other_worker():
        try:
            with sessions() as s, s.begin():
                got.append(get_settings(s, app.config).interval_s)
        except Exception as exc:  # the bug this guards against: IntegrityError on the second insert
            errors.append(exc)

    t = threading.Thread(target=other_worker)
    t.start()
    time.sleep(0.3)  # let the other transaction reach the insert (or SQLite's BEGIN IMMEDIATE) and block
    first.commit()
    first.close()
    t.join(timeout=30)
    assert not t.is_alive()
    assert errors == [] and got == [app.config["INTERVAL_S"]]
