"""A pure-Python MQTT broker inside this process, for ``rwls demo`` and as the test fallback.

:class:`EmbeddedBroker` runs an `amqtt <https://pypi.org/project/amqtt/>`_ broker (asyncio) in a thread of
its own with its own event loop, listening on 127.0.0.1 and a free port chosen by the operating system::

    with EmbeddedBroker() as broker:          # start() has returned: the port accepts connections
        client.connect(broker.host, broker.port)
        ...                                   # stop() on leaving: clients are disconnected, thread joined

What it supports (QoS 1 round trips, persistent sessions and retained messages are checked with paho-mqtt
2.x by ``tests/integration/test_brokers.py``):

- MQTT 3.1.1 over plain TCP, QoS 0, 1 and 2, retained messages, wills, ``+``/``#`` wildcards;
- persistent sessions (``clean_session=False`` with a fixed client id): subscriptions are kept and QoS 1/2
  messages published while the client is away are queued and delivered when it comes back. For that the
  broker authenticates every client with :class:`OpenAccessPlugin` (accept all, like Mosquitto's
  ``allow_anonymous true``); amqtt's own anonymous plugin would mark clients anonymous, and amqtt neither
  queues messages for anonymous sessions nor keeps them after a disconnect.

What it does not support, or does differently from Mosquitto (do not use it where these matter):

- **No MQTT 5** and no MQTT 3.1: a CONNECT with another protocol level gets CONNACK return code 1
  (unacceptable protocol version). A client that prefers v5 must fall back to 3.1.1.
- **Nothing survives a restart**: sessions, queued messages and retained messages live in memory only
  (there is no ``persistence`` like Mosquitto's). Use a private Mosquitto for broker-restart tests.
- No limit on queued messages per offline client (Mosquitto's ``max_queued_messages``), so it never drops
  them silently either, and memory grows with the backlog.
- QoS 1/2 towards a subscriber is weaker than Mosquitto's: a message whose PUBACK has not come back
  within 5 s is given up, neither resent nor kept for the session's next connection. amqtt may also log
  "Received PUBACK for unknown pending message" when a PUBACK overtakes its own bookkeeping; that message
  was delivered, and the sending task waits out those 5 s.
- Messages are delivered at the subscription's QoS even when they were published at a lower QoS (MQTT
  says the minimum of the two).
- Two amqtt 0.12.1 faults with retained messages are worked around by overriding private methods of its
  ``Broker`` (see :class:`_Broker`), so the amqtt version is pinned: check them again before raising it.
- No TLS, no websockets, no users or ACLs, no ``$SYS`` topics, no bridges: a plain local listener only.
- One process, one asyncio loop: far slower than Mosquitto (fine for a demo plant or a test, not for
  benchmarks).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import threading
from dataclasses import dataclass
from types import TracebackType
from typing import Any

from amqtt.broker import Broker
from amqtt.plugins.base import BaseAuthPlugin
from amqtt.session import Session

__all__ = ["EmbeddedBroker", "EmbeddedBrokerError", "OpenAccessPlugin"]

_log = logging.getLogger(__name__)

_LISTENER = "default"


class EmbeddedBrokerError(RuntimeError):
    """The embedded broker could not be started or stopped in time."""


class OpenAccessPlugin(BaseAuthPlugin):
    """Accept every client, with or without user name, and treat it as a full (not anonymous) session.

    amqtt's ``AnonymousAuthPlugin`` flags such clients as anonymous, and amqtt then drops their persistent
    session state; this plugin keeps it, so ``clean_session=False`` behaves as on Mosquitto.
    """

    @dataclass
    class Config:
        """No options."""

    async def authenticate(self, *, session: Session) -> bool:
        session.is_anonymous = False
        return True


class _Broker(Broker):
    """amqtt's broker with two fixes for retained messages (amqtt 0.12.1; both rely on its internals).

    1. On every CONNECT amqtt sends the connecting client, at QoS 0, each retained message matching any topic
       filter that *any* client has subscribed to, even filters the client never subscribed to: a fresh
       subscriber then gets retained messages twice, and an unrelated client gets foreign topics. MQTT sends
       retained messages on SUBSCRIBE only, so that pass is skipped here.
    2. Messages queued for an offline persistent session are delivered with the retain flag set; here they
       are delivered as ordinary messages (retain flag clear), as Mosquitto does.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._connecting: set[str] = set()
        self.open_writers: set[asyncio.StreamWriter] = set()

    async def stream_connected(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter,
                               listener_name: str) -> None:
        # amqtt can leave a connection's transport open (a peer that resets mid-write, a shutdown that times
        # out); close it when its handler ends, and let stop() abort whatever is still open.
        self.open_writers.add(writer)
        try:
            await super().stream_connected(reader, writer, listener_name)
        finally:
            self.open_writers.discard(writer)
            if not writer.is_closing():
                writer.transport.abort()

    def abort_connections(self) -> None:
        for writer in list(self.open_writers):
            writer.transport.abort()
        self.open_writers.clear()

    async def _publish_session_retained_messages(self, session: Session) -> None:
        # Called once per CONNECT, right before the pass of fix 1; _client_message_loop follows that pass.
        if session.client_id:
            self._connecting.add(session.client_id)
        handler = self._get_handler(session)
        if handler is None:
            return
        sends = []
        while not session.retained_messages.empty():
            queued = session.retained_messages.get_nowait()
            sends.append(asyncio.ensure_future(handler.mqtt_publish(queued.topic, queued.data, queued.qos,
                                                                    retain=False)))
        if sends:
            await asyncio.wait(sends)

    async def _publish_retained_messages_for_subscription(self, subscription: tuple[str, int],
                                                          session: Session) -> None:
        if session.client_id in self._connecting:
            return  # the CONNECT-time pass (fix 1)
        await super()._publish_retained_messages_for_subscription(subscription, session)

    async def _client_message_loop(self, client_session: Session, handler: Any) -> None:
        self._connecting.discard(client_session.client_id or "")
        await super()._client_message_loop(client_session, handler)


class EmbeddedBroker:
    """An amqtt MQTT 3.1.1 broker on ``host`` (127.0.0.1) in a background thread; see the module docstring.

    ``port=0`` (the default) lets the operating system pick a free port; :attr:`port` tells which after
    :meth:`start`. ``start_timeout`` and ``stop_timeout`` bound how long :meth:`start` and :meth:`stop` wait.
    ``session_expiry_interval`` (seconds, None = never) drops persistent sessions disconnected for longer.
    """

    def __init__(
        self,
        host: str = "127.0.0.1",
        port: int = 0,
        *,
        start_timeout: float = 10.0,
        stop_timeout: float = 15.0,
        session_expiry_interval: int | None = None,
    ) -> None:
        self._host = host
        self._requested_port = port
        self._start_timeout = start_timeout
        self._stop_timeout = stop_timeout
        self._session_expiry_interval = session_expiry_interval
        self._port: int | None = None
        self._thread: threading.Thread | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._stop_request: asyncio.Event | None = None
        self._ready = threading.Event()
        self._error: BaseException | None = None

    # -- public API -------------------------------------------------------------------------------------

    @property
    def host(self) -> str:
        return self._host

    @property
    def port(self) -> int:
        """The listening port; only known after :meth:`start`."""
        if self._port is None:
            raise EmbeddedBrokerError("the embedded broker is not running")
        return self._port

    @property
    def url(self) -> str:
        """``mqtt://127.0.0.1:<port>``."""
        return f"mqtt://{self._host}:{self.port}"

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive() and self._port is not None

    def start(self) -> int:
        """Start the broker thread and return the port once it listens; raise :class:`EmbeddedBrokerError` on
        failure or after ``start_timeout`` seconds (the thread is then stopped)."""
        if self._thread is not None:
            raise EmbeddedBrokerError("the embedded broker was already started")
        self._ready.clear()
        self._error = None
        self._thread = threading.Thread(target=self._run, name="rwls-embedded-broker", daemon=True)
        self._thread.start()
        if not self._ready.wait(self._start_timeout):
            self._request_stop()
            self._join()
            raise EmbeddedBrokerError(f"the embedded broker did not start within {self._start_timeout} s")
        if self._error is not None or self._port is None:
            self._join()
            raise EmbeddedBrokerError(f"the embedded broker failed to start: {self._error!r}") from self._error
        _log.info("embedded MQTT broker listening on %s", self.url)
        return self._port

    def stop(self) -> None:
        """Disconnect all clients, close the listener and join the thread (bounded by ``stop_timeout``).

        Does nothing when the broker is not running; raises :class:`EmbeddedBrokerError` if the thread is still
        alive after the timeout (it is a daemon thread, so it will not keep the process alive)."""
        if self._thread is None:
            return
        self._request_stop()
        self._join()
        if self._error is not None:
            _log.warning("embedded MQTT broker stopped with an error: %r", self._error)

    def __enter__(self) -> EmbeddedBroker:
        self.start()
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.stop()

    # -- internals --------------------------------------------------------------------------------------

    def _config(self) -> dict[str, Any]:
        return {
            "listeners": {
                _LISTENER: {"type": "tcp", "bind": f"{self._host}:{self._requested_port}"},
            },
            "session_expiry_interval": self._session_expiry_interval,
            # Only our own plugin: no $SYS publisher, no packet logger (it would log every packet).
            "plugins": {f"{__name__}.{OpenAccessPlugin.__name__}": {}},
        }

    def _run(self) -> None:
        try:
            asyncio.run(self._serve())
        except BaseException as exc:  # reported to start()/stop(); never let the thread die silently
            self._error = exc
        finally:
            self._ready.set()

    async def _serve(self) -> None:
        self._loop = asyncio.get_running_loop()
        self._stop_request = asyncio.Event()
        broker = _Broker(self._config(), loop=self._loop)
        await broker.start()
        server = broker._servers[_LISTENER].instance  # amqtt keeps the asyncio.Server there
        try:
            sockets = getattr(server, "sockets", None) or ()
            if not sockets:
                raise EmbeddedBrokerError("the embedded broker has no listening socket")
            self._port = int(sockets[0].getsockname()[1])
            self._ready.set()
            await self._stop_request.wait()
        finally:
            server.close()  # no new connections while shutting down
            try:
                await asyncio.wait_for(broker.shutdown(), timeout=max(1.0, self._stop_timeout / 2))
            except TimeoutError:
                _log.warning("embedded MQTT broker did not shut down cleanly within %.1f s; aborting its "
                             "connections", max(1.0, self._stop_timeout / 2))
            finally:
                broker.abort_connections()
                await asyncio.sleep(0)  # let the aborted transports close their sockets

    def _request_stop(self) -> None:
        loop, stop_request = self._loop, self._stop_request
        if loop is None or stop_request is None:
            return
        with contextlib.suppress(RuntimeError):  # the loop has already closed
            loop.call_soon_threadsafe(stop_request.set)

    def _join(self) -> None:
        thread = self._thread
        if thread is None:
            return
        thread.join(self._stop_timeout)
        if thread.is_alive():
            raise EmbeddedBrokerError(f"the embedded broker thread did not stop within {self._stop_timeout} s")
        self._thread = None
        self._port = None
        self._loop = None
        self._stop_request = None
