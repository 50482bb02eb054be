"""The HTML report printed to PDF by headless Chromium (or Chrome), when one is installed.

The browser is driven over the DevTools protocol through a pair of pipes
(`--remote-debugging-pipe`: commands on its file descriptor 3, answers on 4, each a JSON message
ended by a NUL byte), so no port is opened and no library beyond the standard one is needed. It
runs with a fresh profile that is removed afterwards, no background networking, and opens only the
report file. `Page.printToPDF` prints on A4 or Letter with the run id and "page N of M" in each
page's footer (`footerTemplate`, whose `pageNumber` and `totalPages` classes the browser fills).
"""

from __future__ import annotations

import base64
import contextlib
import fcntl
import html
import json
import os
import select
import shutil
import subprocess
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from planrunner.errors import OutputError

CANDIDATES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable", "chrome",
              "/Applications/Google Chrome.app/Contents/MacOS/Google Chrome",
              "/Applications/Chromium.app/Contents/MacOS/Chromium")
ENVIRONMENT_VARIABLE = "PLANRUNNER_CHROMIUM"
HOW_TO_GET_ONE = ("install Chromium or Google Chrome (Debian/Ubuntu: 'apt-get install chromium'; Fedora: "
                  "'dnf install chromium'; macOS and Windows: Google Chrome from google.com/chrome), "
                  f"or set {ENVIRONMENT_VARIABLE} to the browser's executable")
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--disable-default-apps", "--disable-extensions",
         "--mute-audio", "--remote-debugging-pipe")


@dataclass(frozen=True)
class Paper:
    name: str
    width_in: float
    height_in: float


PAPERS = {"A4": Paper("A4", 210 / 25.4, 297 / 25.4), "Letter": Paper("Letter", 8.5, 11.0)}


def find_browser() -> str:
    """The browser's executable: $PLANRUNNER_CHROMIUM, else the first of the usual names found.
    Raises OutputError, with how to get one, when there is none."""
    chosen = os.environ.get(ENVIRONMENT_VARIABLE)
    if chosen:
        if Path(chosen).is_file() and os.access(chosen, os.X_OK):
            return chosen
        raise OutputError(f"{ENVIRONMENT_VARIABLE} names no executable file", where=chosen, hint=HOW_TO_GET_ONE)
    for name in CANDIDATES:
        found = shutil.which(name) if "/" not in name else (name if os.access(name, os.X_OK) else None)
        if found:
            return found
    raise OutputError("no Chromium or Chrome was found to print the PDF (looked for "
                      + ", ".join(n for n in CANDIDATES if "/" not in n) + " on PATH)",
                      where="pdf", hint=HOW_TO_GET_ONE)


def footer(run_id: str) -> str:
    """The footer template: the run id, then "page N of M", in small grey type."""
    return ('<div style="font-family: sans-serif; font-size: 8px; color: #555; width: 100%; '
            'margin: 0 12mm; display: flex; justify-content: space-between;">'
            f"<span>planrunner run {html.escape(run_id)}</span>"
            '<span>page <span class="pageNumber"></span> of <span class="totalPages"></span></span></div>')


def header(stamp: str | None) -> str:
    """The header template: empty, or a stamp (a rehearsal's) in bold red type on every page."""
    if stamp is None:
        return "<span></span>"
    return ('<div style="font-family: sans-serif; font-size: 10px; font-weight: bold; color: #b00020; width: 100%; '
            f'margin: 0 12mm; text-align: center;">{html.escape(stamp)}</div>')


def print_pdf(page: Path, run_id: str, paper: str = "A4", *, browser: str | None = None,
              timeout: float = 120.0, stamp: str | None = None) -> bytes:
    """The PDF of the HTML file ``page``, printed by headless Chromium on ``paper`` (A4 or Letter);
    ``stamp`` (a rehearsal's) is printed at the top of every page."""
    size = PAPERS[paper]
    binary = browser or find_browser()
    with _session(binary, timeout) as session:
        target = session.call("Target.createTarget", url="about:blank")["targetId"]
        page_session = session.call("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        session.call("Page.enable", session=page_session)
        session.call("Page.navigate", session=page_session, url=page.resolve().as_uri())
        session.wait_for("Page.loadEventFired", page_session)
        answer = session.call("Page.printToPDF", session=page_session, paperWidth=size.width_in,
                              paperHeight=size.height_in, printBackground=True, displayHeaderFooter=True,
                              headerTemplate=header(stamp), footerTemplate=footer(run_id),
                              marginTop=14 / 25.4, marginBottom=16 / 25.4, marginLeft=12 / 25.4,
                              marginRight=12 / 25.4, preferCSSPageSize=False)
    return base64.b64decode(answer["data"])


class _Pipe:
    """DevTools messages over the browser's pipes: NUL-terminated JSON."""

    def __init__(self, process: subprocess.Popen[bytes], to_browser: int, from_browser: int, timeout: float):
        self.process, self.to_browser, self.from_browser = process, to_browser, from_browser
        self.deadline = time.monotonic() + timeout
        self.buffer = b""
        self.next_id = 0
        self.events: list[dict[str, Any]] = []

    def call(self, method: str, session: str | None = None, **params: Any) -> dict[str, Any]:
        self.next_id += 1
        mine = self.next_id
        message: dict[str, Any] = {"id": mine, "method": method, "params": params}
        if session is not None:
            message["sessionId"] = session
        os.write(self.to_browser, json.dumps(message).encode() + b"\0")
        while True:
            answer = self._receive()
            if answer.get("id") == mine:
                if "error" in answer:
                    raise OutputError(f"the browser refused {method}: {answer['error'].get('message')}",
                                      where="pdf", hint="try another Chromium or Chrome version")
                return answer.get("result", {})
            if "method" in answer:
                self.events.append(answer)

    def wait_for(self, event: str, session: str) -> None:
        while True:
            for seen in self.events:
                if seen.get("method") == event and seen.get("sessionId") == session:
                    self.events.remove(seen)
                    return
            self.events.append(self._receive())

    def _receive(self) -> dict[str, Any]:
        while b"\0" not in self.buffer:
            left = self.deadline - time.monotonic()
            if left <= 0:
                raise OutputError("the browser did not finish printing in time", where="pdf",
                                  hint="try again; a very long report may need a faster machine")
            ready, _, _ = select.select([self.from_browser], [], [], min(left, 1.0))
            if not ready:
                continue
            chunk = os.read(self.from_browser, 1 << 20)
            if not chunk:
                raise OutputError(f"the browser stopped (exit code {self.process.poll()})", where="pdf",
                                  hint="check that the browser starts on this machine: run it with --headless")
            self.buffer += chunk
        message, self.buffer = self.buffer.split(b"\0", 1)
        return dict(json.loads(message))


def _high_pipe() -> tuple[int, int]:
    """A pipe whose two ends are numbered 10 or above, so that putting ends at 3 and 4 in the child
    never overwrites another end."""
    ends = os.pipe()
    high = tuple(fcntl.fcntl(end, fcntl.F_DUPFD_CLOEXEC, 10) for end in ends)
    for end in ends:
        os.close(end)
    return high[0], high[1]


@contextlib.contextmanager
def _session(binary: str, timeout: float) -> Iterator[_Pipe]:
    """A headless browser with a fresh profile, driven over its pipes; stopped and removed after."""
    profile = tempfile.mkdtemp(prefix="planrunner-pdf-")
    commands_read, commands_write = _high_pipe()  # the browser reads commands on its fd 3
    answers_read, answers_write = _high_pipe()  # and writes answers on its fd 4

    def wire() -> None:  # in the child, before exec: put the pipe ends at 3 and 4, inheritable
        os.dup2(commands_read, 3)
        os.dup2(answers_write, 4)

    try:
        # close_fds=False: 3 and 4 must survive into the browser (pass_fds would refuse them when the
        # parent has no such descriptors); every other descriptor Python opens is close-on-exec
        process = subprocess.Popen([binary, *FLAGS, f"--user-data-dir={profile}", "about:blank"],
                                   stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                   close_fds=False, preexec_fn=wire)
    except OSError as exc:
        for fd in (commands_read, commands_write, answers_read, answers_write):
            os.close(fd)
        shutil.rmtree(profile, ignore_errors=True)
        raise OutputError(f"cannot start the browser: {exc.strerror or exc}", where=binary,
                          hint=HOW_TO_GET_ONE) from None
    os.close(commands_read)
    os.close(answers_write)
    try:
        yield _Pipe(process, commands_write, answers_read, timeout)
    finally:
        os.close(commands_write)
        os.close(answers_read)
        if process.poll() is None:
            process.terminate()
            try:
                process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=10)
        shutil.rmtree(profile, ignore_errors=True)
