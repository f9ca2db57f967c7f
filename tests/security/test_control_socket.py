"""The control socket cannot be hijacked through its folder.

Covered elsewhere and not repeated here (``tests/ctl/test_ctl_server.py``): the folder is 0700
and the socket 0600 whatever the umask; another user cannot reach the socket, and even with
the files opened up the peer's credentials refuse them; a stale socket is replaced and a live
one refused. Here: what another user could leave where the control folder goes. A symbolic
link (which could point the socket into a folder they can read) and a folder they own (whose
permissions they control) are both refused before anything is bound, and nothing is created
behind the link.
"""

from __future__ import annotations

import asyncio
import os
import pwd
from pathlib import Path

import pytest

from controller.errors import SquallError
from controller.runtime._ctl_server import ControlServer
from controller.runtime._ctl_wire import control_path


def _start(path: Path) -> None:
    """Start a control server on ``path`` (with no target: it must refuse before serving)."""

    async def main() -> None:
        server = ControlServer(None, path)  # type: ignore[arg-type]
        try:
            await server.start()
        finally:
            await server.close()

    asyncio.run(main())


def test_a_symbolic_link_in_place_of_the_control_folder_is_refused(tmp_path: Path) -> None:
    elsewhere = tmp_path / "readable-by-others"
    elsewhere.mkdir(mode=0o700)
    path = control_path(tmp_path / "run.sqlite")
    path.parent.symlink_to(elsewhere, target_is_directory=True)
    with pytest.raises(SquallError, match="in the way of the control folder"):
        _start(path)
    assert list(elsewhere.iterdir()) == []  # no socket was bound behind the link
    assert path.parent.is_symlink()


def test_a_control_folder_owned_by_another_user_is_refused(tmp_path: Path) -> None:
    if os.geteuid() != 0:
        pytest.skip("giving a folder to another user needs root")
    try:
        entry = pwd.getpwnam("nobody")
    except KeyError:
        pytest.skip("no 'nobody' account on this machine")
    path = control_path(tmp_path / "run.sqlite")
    path.parent.mkdir(mode=0o700)
    os.chown(path.parent, entry.pw_uid, entry.pw_gid)
    with pytest.raises(SquallError, match=f"belongs to {entry.pw_name}"):
        _start(path)
    assert list(path.parent.iterdir()) == []
