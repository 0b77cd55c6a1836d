"""Where the live view's records come from: the daemon's MQTT topics, or the pipeline run on the
port itself (``watch --port``, when no daemon is running)."""

from __future__ import annotations

import asyncio
import json
import logging
import time

from ..config import Channel, Config
from .model import WatchModel

log = logging.getLogger("streamcond.watch")

#: Wait between two attempts to reach the broker.
RETRY_S: float = 1.0


def dispatch(model: WatchModel, prefix: str, topic: str, payload: bytes, now: float) -> None:
    """One MQTT message into the model (topics: DESIGN.md "MQTT topics (contract)")."""
    if not topic.startswith(prefix + "/"):
        return
    rest = topic[len(prefix) + 1:]
    if rest == "status":
        model.on_status(payload.decode("utf-8", "replace").strip(), now)
        return
    try:
        doc = json.loads(payload)
    except (ValueError, UnicodeDecodeError):
        return  # not one of ours: ignored, the view goes on
    if not isinstance(doc, dict):
        return
    if rest == "health":
        model.on_health(doc, now)
        return
    parts = rest.split("/")
    if len(parts) == 2 and "kind" in doc:
        doc.setdefault("channel", parts[0])
        model.on_record(doc, now)
    elif len(parts) == 1 and "kind" in doc:  # source-wide gap / fault
        model.on_record(doc, now)


async def mqtt_feed(cfg: Config, model: WatchModel) -> None:
    """Subscribe to ``<prefix>/#`` and feed the model until cancelled; reconnects by itself."""
    from ..probe import observer_client, observer_credentials

    mq = cfg.output.mqtt
    assert mq is not None
    prefix = cfg.topic_prefix.rstrip("/")
    while True:
        password = None
        try:
            password, tls = await asyncio.to_thread(observer_credentials, mq)
            async with observer_client(mq, password, tls, "watch") as client:
                await client.subscribe(prefix + "/#", qos=1)
                model.connected, model.link_error = True, None
                async for msg in client.messages:
                    dispatch(model, prefix, str(msg.topic), bytes(msg.payload or b""), time.time())
        except asyncio.CancelledError:
            raise
        except Exception as e:  # aiomqtt.MqttError, OSError, ssl errors: shown, then retried
            model.connected = False
            text = str(e) or type(e).__name__
            if password:
                text = text.replace(password, "***")
            model.link_error = text
            await asyncio.sleep(RETRY_S)


async def port_feed(cfg: Config, model: WatchModel) -> None:
    """Read the port and run the pipeline here, as the daemon would (no outputs)."""
    import numpy as np

    from ..core import levels
    from ..core.pipeline import Pipeline
    from ..errors import InputError
    from ..io.lineparse import HOST_T
    from ..io.serialsource import Back, Data, LineFramer, Lost, SerialSource
    from ..replay import check_columns, make_parser

    framer = LineFramer(cfg.source.max_line_bytes, resync=True)
    parser = make_parser(cfg)
    pipeline: Pipeline | None = None
    source = SerialSource(cfg.source)
    cols: list[tuple[Channel, int]] = []  # (channel config, column index)
    try:
        async for ev in source.events():
            now = time.time()
            if isinstance(ev, Lost):
                framer.reset()
                model.notes.append(f"device lost: {ev.reason}")
                continue
            if isinstance(ev, Back):
                framer.reset(t_start=ev.t_host, resync=True)
                model.notes.append("device back")
                continue
            if not isinstance(ev, Data):
                continue
            lines, times, dropped = framer.feed(ev.data, ev.t_host)
            if not lines:
                continue
            try:
                parsed = parser.feed_lines(lines, times)
            except InputError as e:
                model.notes.append(" ".join(e.messages))
                parser = make_parser(cfg)
                continue
            model.on_rows(int(parsed.rows.shape[0]), int(parsed.bad) + int(dropped), now)
            if parser.columns is None or parsed.rows.shape[0] == 0:
                continue
            if pipeline is None:
                check_columns(cfg, parser.columns)
                pipeline = Pipeline(cfg, parser.columns + [HOST_T], host_time=cfg.source.host_time)
                idx = {c: i for i, c in enumerate(parser.columns)}
                cols = [(ch, idx[ch.source_column]) for ch in cfg.channel]
            for rec in pipeline.process(parsed.rows):
                model.on_record(rec, now)
            for ch, i in cols:
                # the channel's own levels: a fault sample is no value on the trace
                v, bad = levels.scale(parsed.rows[:, i], float(ch.gain), float(ch.offset), ch.fault)
                model.on_values(ch.name, v if bad is None else np.where(bad, np.nan, v), now)
    finally:
        source.stop()

