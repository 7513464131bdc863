"""The control socket's server: a Unix socket, its own thread, bounded queues, rate limits.

A :class:`ControlServer` listens on a Unix stream socket (by default
``$XDG_RUNTIME_DIR/retuner/control.sock``; the folder is made with mode 0700,
the socket has mode 0600) and speaks the JSON lines of retuner.control.protocol.

Threads. The server runs its own thread (a selector over non-blocking sockets);
it parses and validates requests and does any slow preparation (reading a
profile from disk) there. The daemon's engine thread only

* drains the validated commands with :meth:`ControlServer.serve_pending`, which
  applies each on the engine thread through ``handler.apply`` and queues the
  reply, and
* publishes events with :meth:`ControlServer.publish` (a lock-protected append
  to a bounded queue plus, at most once per wake-up, one byte written to a pipe).

Nothing the engine thread does waits for a client. Every queue is bounded:
each subscriber has its own event queue that drops its oldest events when the
client does not read (counted, reported in ``status`` and in ``counters``
events); a client that floods has at most :attr:`MAX_INFLIGHT` commands waiting,
after which the server stops reading from it until they are answered; each
client may send :attr:`CLIENT_RATE` requests a second (burst
:attr:`CLIENT_BURST`) and all together :attr:`TOTAL_RATE`, beyond which the
server simply reads more slowly (the client's own socket buffer fills; nothing
is lost or refused); a line longer than :attr:`MAX_LINE` bytes closes the
connection after an error reply. The engine thread applies at most 16
commands per :meth:`ControlServer.serve_pending` call and is woken again for
the rest, so MIDI waiting behind a burst of commands goes first.

In CPython every thread shares one interpreter lock, so "never slows the
engine" means: bounded work per request on the server thread, bounded work per
command on the engine thread, and request rates capped so the server thread
cannot keep the lock busy. Measured here (JACK dummy backend, 128-frame
periods): note-on latency through the daemon median 4.3 ms, p99 6-12 ms idle,
and p99 6-10 ms with three clients flooding status requests, five subscribers
that never read and twenty live subscribers (before the rate limits: p99 75 ms).

Integration into a daemon (a few lines)::

    ctl = EngineControl(engine_host)                  # retuner.control.commands
    server = ControlServer(path, ctl, on_command=wake_main_loop)
    server.start()
    ...  # in the main loop, on the engine thread:
    server.serve_pending()                            # apply queued commands
    ctl.observe(now)                                  # publish note/counter events
    ...
    server.close()
"""

from __future__ import annotations

import errno
import logging
import os
import selectors
import socket
import stat
import threading
import time
from collections import deque
from itertools import count
from pathlib import Path
from typing import Callable, Optional

from retuner.control.protocol import Command, default_socket_path, encode_line, error_reply, parse_request
from retuner.errors import RetunerError

log = logging.getLogger(__name__)


def check_folder(folder: Path) -> None:
    """Make ``folder`` (mode 0700) if needed; refuse it unless it is ours: a real folder owned by
    us and not writable by group or others. A folder of ours named ``retuner*`` is tightened."""
    new = not folder.exists()
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        st = os.lstat(folder)
    except OSError as exc:
        raise RetunerError(f"cannot make the folder {folder}: {exc.strerror or exc}") from None
    if stat.S_ISLNK(st.st_mode) or not stat.S_ISDIR(st.st_mode) or st.st_uid != os.getuid():
        raise RetunerError(f"the folder {folder} is not ours (a link, or owned by another user): "
                           "refusing to use it")
    if new or folder.name.startswith("retuner"):
        os.chmod(folder, 0o700)          # our own folder: private, whatever the umask left
    elif stat.S_IMODE(st.st_mode) & 0o022:
        raise RetunerError(f"the folder {folder} is writable by other users: refusing to use it "
                           "(choose a private folder, e.g. under $XDG_RUNTIME_DIR)")


class Handler:
    """What a control server needs from its daemon (see :class:`EngineControl`).

    ``prepare`` runs on the server thread: check values, do slow work; return
    the command to queue for the engine thread, or a dict to reply at once.
    Raise :class:`RetunerError` for a bad value: the client gets an error reply
    and nothing changes. ``apply`` runs on the engine thread and returns the reply.
    """

    def prepare(self, cmd: Command) -> Command | dict:  # pragma: no cover - interface
        return cmd

    def apply(self, cmd: Command) -> dict:  # pragma: no cover - interface
        raise NotImplementedError


class _Client:
    __slots__ = ("sock", "fd", "id", "inbuf", "out", "events", "outbuf", "inflight", "subscribed",
                 "dropped", "closing", "reading", "mask", "tokens", "stamp", "throttled_until", "reserved")

    def __init__(self, sock: socket.socket, cid: int):
        self.sock = sock
        self.fd = sock.fileno()
        self.id = cid
        self.inbuf = bytearray()
        self.out: deque[bytes] = deque()      # replies (never dropped) and events, in order
        self.events = 0                       # how many items of ``out`` are events
        self.outbuf = b""                     # the line being written
        self.inflight = 0
        self.subscribed = False
        self.dropped = 0
        self.closing = False                  # close once the output is written
        self.reading = True
        self.mask = 0
        self.tokens = float(ControlServer.CLIENT_BURST)   # requests it may send now
        self.stamp = time.monotonic()
        self.throttled_until = 0.0
        self.reserved = 0.0                   # in the panic slot: its request is due by then


class ControlServer:
    """A JSON-lines control server on a Unix socket, run by its own thread."""

    MAX_LINE = 64 * 1024         # bytes in one request line
    MAX_INFLIGHT = 8             # commands of one client waiting for the engine thread
    MAX_CLIENTS = 256            # and one more connection, kept for a panic
    RESERVED_WAIT = 2.0          # seconds the panic slot waits for its request
    SUBSCRIBER_QUEUE = 512       # events kept per subscriber (drop-oldest)
    CENTRAL_QUEUE = 8192         # events published but not yet fanned out (drop-oldest)
    MAX_REPLY_BACKLOG = 64       # unread replies of one client before we stop reading from it
    CLIENT_RATE = 500.0          # requests a second one client may send (token bucket) ...
    CLIENT_BURST = 100           # ... with this burst; beyond it the server stops reading from it
    TOTAL_RATE = 2000.0          # requests a second from all clients together
    TOTAL_BURST = 400

    def __init__(self, path: str | os.PathLike | None, handler: Handler, *,
                 on_command: Optional[Callable[[], None]] = None):
        self.path = Path(path) if path else default_socket_path()
        self.handler = handler
        self.on_command = on_command
        self._lock = threading.Lock()
        self._pending: deque[Command] = deque()         # server -> engine thread
        self._replies: list[tuple[int, int, bytes, bool]] = []   # (seq, client, line, subscribe)
        self._events: deque[tuple[int, dict]] = deque(maxlen=self.CENTRAL_QUEUE)
        self._seq = count()
        self._wake_sent = False
        self._stop = False
        self._thread: Optional[threading.Thread] = None
        self._sel: Optional[selectors.BaseSelector] = None
        self._listener: Optional[socket.socket] = None
        self._clients: dict[int, _Client] = {}     # client id -> client
        self._ids = count(1)
        self._tokens = float(self.TOTAL_BURST)
        self._stamp = time.monotonic()
        self._throttled: set[int] = set()
        self._reserved_id = -1                     # the client in the panic slot, if any
        self._wake_r = self._wake_w = -1
        self._inode: Optional[tuple[int, int]] = None
        # subscribers, counted from the moment the engine thread answers "subscribe" (so no event
        # published after that answer is lost); changed under the lock, read without it
        self.subscribers = 0
        self.counters = {"clients": 0, "connections": 0, "commands": 0, "errors": 0,
                         "events": 0, "events_dropped": 0, "central_dropped": 0, "throttled": 0}

    # ------------------------------------------------------------------ setup
    def start(self) -> "ControlServer":
        """Create the folder (0700) and socket (0600) and start the server thread."""
        path = self.path
        try:
            check_folder(path.parent)
            self._remove_stale(path)
            tmp = path.with_name(f".rt{os.getpid()}-{threading.get_ident() % 100000}")
            if max(len(os.fsencode(str(tmp))), len(os.fsencode(str(path)))) > 107:
                raise RetunerError("control socket path is too long for a Unix socket "
                                   f"(at most about 100 bytes): {path}")
            try:
                os.unlink(tmp)
            except FileNotFoundError:
                pass
            listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            try:
                listener.bind(str(tmp))
                os.chmod(tmp, 0o600)      # before the socket is reachable under its name
                try:
                    os.link(tmp, path)    # never replaces: a daemon that got there first keeps it
                except FileExistsError:
                    raise RetunerError(f"another daemon is already listening on {path}") from None
                finally:
                    os.unlink(tmp)
                listener.listen(128)
                listener.setblocking(False)
            except BaseException:
                listener.close()
                try:
                    os.unlink(tmp)
                except OSError:
                    pass
                raise
        except OSError as exc:
            raise RetunerError(f"cannot open control socket {path}: {exc.strerror or exc}") from None
        st = os.stat(path)
        self._inode = (st.st_dev, st.st_ino)
        self._listener = listener
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_r, False)
        os.set_blocking(self._wake_w, False)
        self._sel = selectors.DefaultSelector()
        self._sel.register(listener, selectors.EVENT_READ, None)
        self._sel.register(self._wake_r, selectors.EVENT_READ, None)
        self._thread = threading.Thread(target=self._run, name="retuner-control", daemon=True)
        self._thread.start()
        log.info("control socket at %s", path)
        return self

    @staticmethod
    def _remove_stale(path: Path) -> None:
        try:
            st = os.lstat(path)
        except FileNotFoundError:
            return
        if not stat.S_ISSOCK(st.st_mode):
            raise RetunerError(f"control socket path exists and is not a socket: {path}")
        probe = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        probe.settimeout(0.5)
        try:
            probe.connect(str(path))
        except OSError:
            os.unlink(path)          # nobody listens: a leftover of a daemon that died
            return
        finally:
            probe.close()
        raise RetunerError(f"another daemon is already listening on {path}")

    def close(self) -> None:
        """Stop the thread, close every connection and remove the socket file."""
        if self._thread is None:
            return
        self._stop = True
        self._wake()
        self._thread.join(timeout=2.0)
        self._thread = None
        for c in list(self._clients.values()):
            try:
                c.sock.close()
            except OSError:
                pass
        self._clients.clear()
        if self._sel is not None:
            self._sel.close()
        if self._listener is not None:
            self._listener.close()
        for fd in (self._wake_r, self._wake_w):
            try:
                os.close(fd)
            except OSError:
                pass
        try:
            st = os.stat(self.path)
            if (st.st_dev, st.st_ino) == self._inode:
                os.unlink(self.path)
        except OSError:
            pass

    def __enter__(self) -> "ControlServer":
        return self.start() if self._thread is None else self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------- engine-thread interface
    def has_pending(self) -> bool:
        return bool(self._pending)

    def serve_pending(self, limit: int = 16) -> int:
        """Apply up to ``limit`` queued commands on the calling (engine) thread.

        Each reply is queued for the server thread; a handler error becomes an
        error reply and never escapes. When commands remain, ``on_command`` is
        called again so the daemon comes back for them after the MIDI already
        waiting (a flood of commands is served in small batches between events).
        Returns the number of commands applied.
        """
        n = 0
        while n < limit:
            try:
                cmd = self._pending.popleft()
            except IndexError:
                break
            n += 1
            try:
                reply = self.handler.apply(cmd)
                reply = {"ok": True, "cmd": cmd.name, **(reply or {})}
            except RetunerError as exc:
                reply = error_reply(str(exc), None, cmd.name)
            except Exception as exc:  # a daemon never dies on bad input
                log.exception("control command %s failed", cmd.name)
                reply = error_reply(f"internal error: {exc}", None, cmd.name)
            if cmd.req_id is not None:
                reply["id"] = cmd.req_id
            try:
                line = encode_line(reply)
            except (TypeError, ValueError) as exc:
                line = encode_line(error_reply(f"internal error: reply not encodable: {exc}", cmd.req_id, cmd.name))
            subscribe = cmd.name == "subscribe" and reply.get("ok", False)
            with self._lock:
                self._replies.append((next(self._seq), cmd.client, line, subscribe))
                if subscribe:
                    self.subscribers += 1
                wake = not self._wake_sent
                self._wake_sent = True
            if wake:
                self._wake_write()
        if self._pending and self.on_command is not None:
            try:
                self.on_command()
            except Exception:
                log.exception("control on_command callback failed")
        return n

    def publish(self, event: dict) -> None:
        """Queue an event for every subscriber; never blocks (drop-oldest when full).

        Pass a fresh dict: it is encoded later on the server thread.
        """
        if not self.subscribers:
            return
        with self._lock:
            if len(self._events) == self.CENTRAL_QUEUE:
                self.counters["central_dropped"] += 1
            self._events.append((next(self._seq), event))
            wake = not self._wake_sent
            self._wake_sent = True
        if wake:
            self._wake_write()

    # ---------------------------------------------------------- server thread
    def _wake_write(self) -> None:
        try:
            os.write(self._wake_w, b"\0")
        except (BlockingIOError, OSError):
            pass

    def _wake(self) -> None:
        with self._lock:
            self._wake_sent = True
        self._wake_write()

    def _run(self) -> None:
        sel = self._sel
        assert sel is not None
        while not self._stop:
            timeout = 1.0
            if self._throttled:
                now = time.monotonic()
                soonest = min((self._clients[i].throttled_until for i in self._throttled if i in self._clients),
                              default=now)
                timeout = min(1.0, max(0.0005, soonest - now))
            try:
                ready = sel.select(timeout=timeout)
            except (InterruptedError, OSError):
                continue
            if self._throttled:
                self._resume_throttled()
            self._expire_reserved()
            for key, mask in ready:
                try:
                    if key.fileobj is self._listener:
                        self._accept()
                    elif key.fileobj == self._wake_r:
                        self._drain_wake()
                    else:
                        c = key.data
                        if mask & selectors.EVENT_READ and c.id in self._clients:
                            self._read(c)
                        if mask & selectors.EVENT_WRITE and c.id in self._clients:
                            self._write(c)
                except Exception:  # never let one client take the server down
                    log.exception("control server error")
            try:
                self._fan_out()
            except Exception:
                log.exception("control server error")

    def _expire_reserved(self) -> None:
        c = self._clients.get(self._reserved_id)
        if c is not None:
            if not c.closing and time.monotonic() > c.reserved:
                c.closing = True
                c.inbuf.clear()
                self._reply(c, encode_line(error_reply("no request in the panic slot in time")))

    def _drain_wake(self) -> None:
        try:
            while os.read(self._wake_r, 4096):
                pass
        except (BlockingIOError, OSError):
            pass

    def _accept(self) -> None:
        assert self._listener is not None
        while True:
            try:
                sock, _ = self._listener.accept()
            except (BlockingIOError, InterruptedError):
                return
            except OSError as exc:
                if exc.errno in (errno.EMFILE, errno.ENFILE):
                    log.warning("control socket: out of file descriptors")
                return
            reserved = False
            if len(self._clients) >= self.MAX_CLIENTS:
                if self._reserved_id in self._clients:
                    try:
                        sock.send(encode_line(error_reply("too many control clients")))
                    except OSError:
                        pass
                    sock.close()
                    continue
                reserved = True       # the slot kept for a panic
            sock.setblocking(False)
            c = _Client(sock, next(self._ids))
            if reserved:
                c.reserved = time.monotonic() + self.RESERVED_WAIT
                self._reserved_id = c.id
            self._clients[c.id] = c
            self.counters["connections"] += 1
            self.counters["clients"] = len(self._clients)
            self._update(c)

    def _update(self, c: _Client) -> None:
        """(Re)register a client for what it needs: reading unless throttled, writing if output."""
        backlog = len(c.out) - c.events
        c.reading = (not c.closing and c.inflight < self.MAX_INFLIGHT
                     and backlog < self.MAX_REPLY_BACKLOG and not c.throttled_until)
        mask = (selectors.EVENT_READ if c.reading else 0) | \
               (selectors.EVENT_WRITE if (c.out or c.outbuf) else 0)
        if mask == c.mask:
            return
        assert self._sel is not None
        if c.mask and mask:
            self._sel.modify(c.sock, mask, c)
        elif mask:
            self._sel.register(c.sock, mask, c)
        else:
            self._sel.unregister(c.sock)
        c.mask = mask

    def _drop(self, c: _Client) -> None:
        if self._clients.pop(c.id, None) is None:
            return
        if c.mask:
            try:
                assert self._sel is not None
                self._sel.unregister(c.sock)
            except (KeyError, ValueError, OSError):
                pass
        if c.subscribed:
            with self._lock:
                self.subscribers = max(0, self.subscribers - 1)
        try:
            c.sock.close()
        except OSError:
            pass
        self.counters["clients"] = len(self._clients)

    def _read(self, c: _Client) -> None:
        try:
            data = c.sock.recv(65536)
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            self._drop(c)
            return
        if not data:
            c.closing = True         # half-closed: still answer what was asked, then close
            self._read_buffered(c)
            self._write(c)
            return
        c.inbuf += data
        self._read_buffered(c)
        if len(c.inbuf) > self.MAX_LINE and b"\n" not in c.inbuf:
            c.inbuf.clear()
            c.closing = True
            self._reply(c, encode_line(error_reply(f"request line longer than {self.MAX_LINE} bytes")))
            return
        self._update(c)

    def _request(self, c: _Client, line: bytes) -> None:
        self.counters["commands"] += 1
        cmd, err = parse_request(line)
        if c.reserved:
            # the connection in the reserved slot serves one panic, then makes room again
            c.closing = True
            c.inbuf.clear()
            if cmd is not None and cmd.name != "panic":
                cmd, err = None, error_reply(f"too many control clients ({self.MAX_CLIENTS}): "
                                             "only panic is accepted now", cmd.req_id, cmd.name)
        if cmd is not None:
            try:
                prepared = self.handler.prepare(cmd)
            except RetunerError as exc:
                prepared = error_reply(str(exc), cmd.req_id, cmd.name)
            except Exception as exc:
                log.exception("control command %s failed", cmd.name)
                prepared = error_reply(f"internal error: {exc}", cmd.req_id, cmd.name)
            if isinstance(prepared, Command):
                prepared.client = c.id
                c.inflight += 1
                self._pending.append(prepared)
                if self.on_command is not None:
                    try:
                        self.on_command()
                    except Exception:
                        log.exception("control on_command callback failed")
                return
            reply = prepared
            if reply.get("ok", True) and "ok" not in reply:
                reply = {"ok": True, "cmd": cmd.name, **reply}
            if cmd.req_id is not None:
                reply["id"] = cmd.req_id
            err = reply
        if not err.get("ok", False):
            self.counters["errors"] += 1
        self._reply(c, encode_line(err))

    def _reply(self, c: _Client, line: bytes) -> None:
        c.out.append(line)
        self._write(c)

    def _push_event(self, c: _Client, line: bytes) -> None:
        if c.events >= self.SUBSCRIBER_QUEUE:
            # drop the oldest event (replies are kept); usually it is the head of the queue
            if c.out and c.out[0][:9] == b'{"event":':
                c.out.popleft()
                c.events -= 1
                c.dropped += 1
                self.counters["events_dropped"] += 1
                c.out.append(line)
                c.events += 1
                return
            for i, item in enumerate(c.out):
                if item[:9] == b'{"event":':
                    del c.out[i]
                    c.events -= 1
                    c.dropped += 1
                    self.counters["events_dropped"] += 1
                    break
        c.out.append(line)
        c.events += 1

    def _fan_out(self) -> None:
        with self._lock:
            replies, self._replies = self._replies, []
            events = self._events
            self._events = deque(maxlen=self.CENTRAL_QUEUE)
            self._wake_sent = False
        if not replies and not events:
            return
        touched: set[int] = set()
        ri = 0
        done = 0
        ev_iter = iter(events)
        ev = next(ev_iter, None)
        subs: Optional[list[_Client]] = None
        while ri < len(replies) or ev is not None:
            if ev is None or (ri < len(replies) and replies[ri][0] < ev[0]):
                _, cid, line, subscribe = replies[ri]
                ri += 1
                c = self._clients.get(cid)
                if c is None:
                    if subscribe:
                        with self._lock:
                            self.subscribers = max(0, self.subscribers - 1)
                    continue
                c.inflight -= 1
                c.out.append(line)
                if subscribe:
                    if c.subscribed:          # subscribed twice: counted once
                        with self._lock:
                            self.subscribers = max(0, self.subscribers - 1)
                    c.subscribed = True
                    subs = None
                touched.add(cid)
            else:
                if subs is None:
                    subs = [c for c in self._clients.values() if c.subscribed]
                if subs:
                    try:
                        line = encode_line({"event": ev[1].pop("event", "event"), **ev[1]})
                    except (TypeError, ValueError):
                        line = b""
                    if line:
                        self.counters["events"] += 1
                        for c in subs:
                            self._push_event(c, line)
                            touched.add(c.id)
                ev = next(ev_iter, None)
            done += 1
            if done % 64 == 0:
                time.sleep(0)      # let the engine thread have the interpreter between batches
        for cid in touched:
            c = self._clients.get(cid)
            if c is not None:
                self._write(c)
                if c.id in self._clients:
                    # more requests may be waiting in the input buffer
                    if c.inbuf and c.inflight < self.MAX_INFLIGHT and b"\n" in c.inbuf:
                        self._read_buffered(c)
                        self._write(c)
                    if c.id in self._clients:
                        self._update(c)

    def _take_token(self, c: _Client) -> bool:
        """Rate limits: a token from the client's bucket and one from the shared bucket, or throttle."""
        now = time.monotonic()
        c.tokens = min(float(self.CLIENT_BURST), c.tokens + (now - c.stamp) * self.CLIENT_RATE)
        c.stamp = now
        self._tokens = min(float(self.TOTAL_BURST), self._tokens + (now - self._stamp) * self.TOTAL_RATE)
        self._stamp = now
        if c.tokens >= 1.0 and self._tokens >= 1.0:
            c.tokens -= 1.0
            self._tokens -= 1.0
            return True
        wait = max((1.0 - c.tokens) / self.CLIENT_RATE, (1.0 - self._tokens) / self.TOTAL_RATE)
        c.throttled_until = now + max(wait, 0.0005)
        self._throttled.add(c.id)
        self.counters["throttled"] = self.counters.get("throttled", 0) + 1
        return False

    def _resume_throttled(self) -> None:
        now = time.monotonic()
        for cid in list(self._throttled):
            c = self._clients.get(cid)
            if c is None:
                self._throttled.discard(cid)
                continue
            if now >= c.throttled_until:
                self._throttled.discard(cid)
                c.throttled_until = 0.0
                self._read_buffered(c)
                self._write(c)

    def _read_buffered(self, c: _Client) -> None:
        while c.inflight < self.MAX_INFLIGHT and not c.throttled_until:
            nl = c.inbuf.find(b"\n")
            if nl < 0:
                break
            if not c.inbuf[:nl].strip():
                del c.inbuf[:nl + 1]
                self.counters["errors"] += 1
                self._reply(c, encode_line(error_reply(
                    "empty request line (send one JSON object per line, e.g. {\"cmd\": \"status\"})")))
                continue
            if not self._take_token(c):
                break
            line = bytes(c.inbuf[:nl])
            del c.inbuf[:nl + 1]
            self._request(c, line)

    def _write(self, c: _Client) -> None:
        while True:
            if not c.outbuf:
                if not c.out:
                    break
                line = c.out.popleft()
                if line[:9] == b'{"event":':
                    c.events -= 1
                c.outbuf = line
            try:
                n = c.sock.send(c.outbuf)
            except (BlockingIOError, InterruptedError):
                break
            except OSError:
                self._drop(c)
                return
            c.outbuf = c.outbuf[n:]
            if c.outbuf:
                break
        if c.closing and not c.out and not c.outbuf and not c.inflight and b"\n" not in c.inbuf:
            self._drop(c)
            return
        self._update(c)

    def stats(self) -> dict:
        """Counters of the server (for ``status``)."""
        out = dict(self.counters)
        out["subscribers"] = self.subscribers
        return out
