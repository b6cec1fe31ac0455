"""Hostile input and faults, in one place: every case ends in a one-line error
(or a documented skip) and leaves an index equal to a fresh build.

Sections (one per area, so each can grow without touching the others):
the index folder and files written outside it; terminal output; file names
and bytes; configuration and command-line values; the daemon; full disk and
read-only folders; a property-based sweep over random bytes.
"""

from __future__ import annotations

# == the index folder: nothing written outside the repository and its index ==




# == terminal output: control characters escaped, JSON exact ==




# == file names and bytes: non-UTF-8 names, newlines in names ==




# == configuration and command-line values ==




# == the daemon: requests, locks, sockets, first build ==




# == full disk, read-only index, damaged store, a build in progress ==




# == a property-based sweep over random bytes ==
