"""A real IMAP server for the intake tests: Debian's dovecot-imapd, started per test module on a
free loopback port with a throwaway configuration, mail folder and user; and a TCP relay that
can cut every connection (a server dropping its clients)."""

from __future__ import annotations

import contextlib
import imaplib
import os
import re
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Iterable
from pathlib import Path

from service.testing import free_port, wait_until

DOVECOT = shutil.which("dovecot") or "/usr/sbin/dovecot"
USER, PASSWORD = "ferry", "not-a-real-secret-7d1e"
MAIL_UID = 65534  # nobody: dovecot does not deliver mail as root


def dovecot_missing() -> str | None:
    """Why the IMAP tests cannot run here, or None."""
    if not Path(DOVECOT).exists():
        return "dovecot-imapd is not installed (make test installs it)"
    if os.geteuid() != 0:
        return "the dovecot test server is started as root (it drops to its own users)"
    return None


class Dovecot:
    """One private dovecot: ``start()``, ``stop()``, and IMAP helpers for the tests."""

    def __init__(self, tls: bool = False) -> None:
        self.tls = tls
        # not under pytest's tmp folder: dovecot's unprivileged processes must reach it
        self.root = Path(tempfile.mkdtemp(prefix="mixroute-imap-"))
        self.root.chmod(0o755)
        self.port = free_port()
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> Dovecot:
        home = self.root / "home"
        home.mkdir()
        os.chown(home, MAIL_UID, MAIL_UID)
        (self.root / "passwd").write_text(f"{USER}:{{PLAIN}}{PASSWORD}\n")
        config = self.root / "dovecot.conf"
        plain_port, tls_port = (0, self.port) if self.tls else (self.port, 0)
        ssl_lines = "ssl = no"
        if self.tls:
            self.cert = self.root / "cert.pem"
            key = self.root / "key.pem"
            subprocess.run(
                ["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2",
                 "-keyout", str(key), "-out", str(self.cert), "-subj", "/CN=localhost",
                 "-addext", "subjectAltName=DNS:localhost,IP:127.0.0.1"],
                check=True, capture_output=True,
            )  # fmt: skip
            ssl_lines = f"ssl = required\nssl_cert = <{self.cert}\nssl_key = <{key}"
        config.write_text(
            f"""
base_dir = {self.root}/run
state_dir = {self.root}/state
log_path = {self.root}/dovecot.log
protocols = imap
listen = 127.0.0.1
{ssl_lines}
disable_plaintext_auth = no
auth_mechanisms = plain login
mail_location = maildir:~/Maildir
first_valid_uid = 1
passdb {{
  driver = passwd-file
  args = scheme=PLAIN username_format=%u {self.root}/passwd
}}
userdb {{
  driver = static
  args = uid={MAIL_UID} gid={MAIL_UID} home={home}/%u
}}
service imap-login {{
  inet_listener imap {{
    address = 127.0.0.1
    port = {plain_port}
  }}
  inet_listener imaps {{
    address = 127.0.0.1
    port = {tls_port}
  }}
}}
service anvil {{
  chroot =
}}
"""
        )
        self.process = subprocess.Popen(
            [DOVECOT, "-F", "-c", str(config)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            start_new_session=True,
        )
        wait_until(self._answers, timeout=30, what="dovecot to listen")
        return self

    def _answers(self) -> bool:
        if self.process is not None and self.process.poll() is not None:
            err = self.process.stderr.read().decode() if self.process.stderr else ""
            raise RuntimeError(f"dovecot exited: {err}")
        with contextlib.suppress(OSError), socket.create_connection(("127.0.0.1", self.port), 1):
            return True
        return False

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGTERM)
            try:
                self.process.wait(10)
            except subprocess.TimeoutExpired:
                os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(10)
        shutil.rmtree(self.root, ignore_errors=True)

    # -- IMAP helpers -------------------------------------------------------------------------

    def client(self) -> imaplib.IMAP4:
        if self.tls:
            import ssl

            context = ssl.create_default_context(cafile=str(self.cert))
            conn: imaplib.IMAP4 = imaplib.IMAP4_SSL(
                "127.0.0.1", self.port, ssl_context=context, timeout=30
            )
        else:
            conn = imaplib.IMAP4("127.0.0.1", self.port, timeout=30)
        conn.login(USER, PASSWORD)
        return conn

    def append(self, messages: Iterable[bytes], folder: str = "INBOX") -> int:
        count = 0
        conn = self.client()
        try:
            for raw in messages:
                typ, data = conn.append(folder, None, None, raw)
                assert typ == "OK", data
                count += 1
        finally:
            conn.logout()
        return count

    def folders(self) -> list[str]:
        """Every folder name as the server lists it (modified UTF-7, unquoted)."""
        conn = self.client()
        try:
            _, listed = conn.list()
        finally:
            conn.logout()
        names = []
        for line in listed:
            match = re.match(rb'\([^)]*\) (?:"[^"]*"|NIL) (.*)$', line)
            assert match, line
            name = match.group(1).decode()
            names.append(name[1:-1] if name.startswith('"') else name)
        return names

    def message_ids(self, folder: str) -> list[tuple[str, list[str]]]:
        """(Message-ID, flags) of every message in ``folder`` (encoded name)."""
        conn = self.client()
        try:
            typ, count = conn.select('"' + folder + '"', readonly=True)
            assert typ == "OK", folder
            if int(count[0]) == 0:
                return []
            _, data = conn.fetch("1:*", "(FLAGS BODY.PEEK[HEADER.FIELDS (MESSAGE-ID)])")
        finally:
            conn.logout()
        out = []
        for item in data:
            if not isinstance(item, tuple):
                continue
            flags = re.search(rb"FLAGS \(([^)]*)\)", item[0])
            header = item[1].decode().strip()
            value = header.split(":", 1)[1].strip().strip("<>") if header else ""
            out.append((value, flags.group(1).decode().split() if flags else []))
        return out

    def everything(self) -> dict[str, list[tuple[str, list[str]]]]:
        return {name: self.message_ids(name) for name in self.folders()}


class CuttableRelay:
    """A loopback TCP relay in front of a server; :meth:`cut` closes every open connection
    (both sides), as a server or a network that drops its clients does."""

    def __init__(self, upstream_port: int) -> None:
        self.upstream = upstream_port
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = int(self.listener.getsockname()[1])
        self.connections: list[socket.socket] = []
        self.accepted = 0
        self.lock = threading.Lock()
        self.closed = False
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while not self.closed:
            try:
                client, _ = self.listener.accept()
            except OSError:
                return
            server = socket.create_connection(("127.0.0.1", self.upstream))
            with self.lock:
                self.accepted += 1
                self.connections += [client, server]
            for a, b in ((client, server), (server, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(source: socket.socket, sink: socket.socket) -> None:
        with contextlib.suppress(OSError):
            while data := source.recv(65536):
                sink.sendall(data)
        for sock in (source, sink):
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)

    def cut(self) -> int:
        with self.lock:
            connections, self.connections = self.connections, []
        for sock in connections:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
            sock.close()
        return len(connections) // 2

    def close(self) -> None:
        self.closed = True
        self.listener.close()
        self.cut()


def settle(seconds: float = 0.05) -> None:
    """A short pause for a relay thread to pass bytes on (not a timing assertion)."""
    time.sleep(seconds)
