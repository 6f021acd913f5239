"""Service log files: private like the database (0600), and nothing in a logged value that a
terminal or log viewer would act on."""

from __future__ import annotations

import logging
import os
import stat

from scheduler.service.log import EventFormatter, EventLog, create_log_file, setup_logging


def _mode(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


def test_log_file_is_created_0600_also_after_rotation(tmp_path):
    old = os.umask(0o022)  # the usual umask, under which files are created 0644
    try:
        path = tmp_path / "service.log"
        log = setup_logging(str(path))
        log.info("service_started", pid=1)
        assert _mode(path) == 0o600
        path.rename(tmp_path / "service.log.1")  # logrotate moves it away
        log.info("after_rotation")
        assert path.is_file() and _mode(path) == 0o600
        created = tmp_path / "precreated.log"
        create_log_file(created)
        assert _mode(created) == 0o600
        os.chmod(created, 0o640)  # an operator opened an existing log to a group on purpose
        create_log_file(created)
        assert _mode(created) == 0o640
    finally:
        os.umask(old)
        logging.getLogger("nightplan.service").handlers.clear()


def test_logged_values_cannot_drive_a_terminal():
    records = []

    class Keep(logging.Handler):
        def emit(self, record):
            records.append(EventFormatter().format(record))

    logger = logging.getLogger("test.log.escapes")
    logger.propagate = False
    logger.handlers[:] = [Keep()]
    logger.setLevel(logging.INFO)
    EventLog(logger).warning("feed_rejected", file="x\x1b]0;owned\x07.csv", source="met\u009b2J",
                             reason="\u202eevil", name="Zoë", broken="a\udcffb")
    line = records[0]
    for bad in ("\x1b", "\x07", "\u009b", "\u202e", "\udcff"):
        assert bad not in line
    assert "file=x\\x1b]0;owned\\x07.csv " in line and "reason=\\u202eevil " in line  # shown, not obeyed
    assert "name=Zoë" in line  # ordinary letters stay as they are
