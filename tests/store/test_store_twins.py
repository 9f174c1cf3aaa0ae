"""monitor.store.twins: a writer's own hidden twin, and the twins killed writers left behind."""

from __future__ import annotations

import os
import time

from monitor.store.twins import STALE_TWIN_S, twin


def test_the_twins_of_killed_writers_are_removed_by_the_next_writer_and_no_other_file_is(tmp_path):
    target = tmp_path / "cohort [a].nwb"        # glob's special characters in the name
    old, fresh = twin(target), twin(target)      # a killed writer's and a running writer's
    other = twin(tmp_path / "cohort [a].nwb.x")  # another name's twin, as old
    plain = tmp_path / ".cohort [a].nwb.notes"   # not a twin at all
    plain.write_text("kept")
    day_ago = time.time() - STALE_TWIN_S - 60
    for path in (old, other, plain):
        os.utime(path, (day_ago, day_ago))
    mine = twin(target)
    assert not old.exists()
    assert fresh.exists() and other.exists() and plain.exists() and mine.exists()
    assert len({old, fresh, mine}) == 3 and all(p.name.startswith(".cohort [a].nwb.") for p in (fresh, mine))
