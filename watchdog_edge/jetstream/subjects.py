"""Subjects of the JetStream workers: MQTT topics as NATS subjects, partitions, the server's mapping.

The rules of this file:

1. An MQTT topic is a NATS subject with '/' as '.' (the NATS server's MQTT listener does the
   same; it refuses '.' and ' ' inside MQTT topics, so the model topics must not hold them).
2. A model's partition is ``fnv1a32(model id) % partitions``: what the server's subject mapping
   ``{{partition(N, k)}}`` computes on the one wildcard token ``k`` that holds the model id.
   The server does the partitioning; the workers only compute it to know which models a
   partition holds (a test holds the two equal for many ids).
3. The inbound subject of a message is ``PREFIX.in.<partition>.m.<the topic as a subject>``,
   made by the server's mapping from the topic's own subject; a timer tick of a partition is
   ``PREFIX.in.<partition>.t``. One durable consumer per partition filters ``PREFIX.in.<p>.>``.
4. Planned-work commands concern every partition (a window may name models of several, or
   all), so they are not partitioned: the mapping puts the agent's command topic on
   ``PREFIX.in.c.m.<the topic as a subject>``, in the same input stream, and every partition's
   holder reads them in stream order between its own messages (worker.py, rule 7).
"""

from __future__ import annotations

from dataclasses import dataclass

from watchdog_edge.core.settings import Config, ModelSettings
from watchdog_edge.errors import ConfigError

COMMANDS = -1  # the "partition" of the planned-work commands, which every partition reads (rule 4)
_FNV_OFFSET = 0x811C9DC5
_FNV_PRIME = 0x01000193


def fnv1a32(data: bytes) -> int:
    """32-bit FNV-1a (the hash the server's ``partition`` mapping uses).

    Values from the FNV authors' published test vectors (from memory; the test against the
    server's own mapping is the real check):

    >>> hex(fnv1a32(b"")), hex(fnv1a32(b"a")), hex(fnv1a32(b"foobar"))
    ('0x811c9dc5', '0xe40c292c', '0xbf9cf968')
    """
    h = _FNV_OFFSET
    for b in data:
        h = ((h ^ b) * _FNV_PRIME) & 0xFFFFFFFF
    return h


def partition_of(model: str, partitions: int) -> int:
    """The partition of a model id."""
    return fnv1a32(model.encode()) % partitions


def topic_to_subject(topic: str) -> str:
    """An MQTT topic (or filter) as a NATS subject (or wildcard subject).

    >>> topic_to_subject("plant/a/pred"), topic_to_subject("plant/+/truth"), topic_to_subject("plant/#")
    ('plant.a.pred', 'plant.*.truth', 'plant.>')
    """
    return ".".join("*" if lv == "+" else ">" if lv == "#" else lv for lv in topic.split("/"))


def subject_to_topic(subject: str) -> str:
    """A NATS subject as the MQTT topic it came from."""
    return subject.replace(".", "/")


@dataclass(frozen=True, slots=True)
class Subjects:
    """The subjects of one deployment (one subject prefix, one partition count)."""

    prefix: str
    partitions: int

    def partition_filter(self, p: int) -> str:
        """What the durable consumer of partition ``p`` takes."""
        return f"{self.prefix}.in.{p}.>"

    def all_inbound(self) -> str:
        return f"{self.prefix}.in.>"

    def tick(self, p: int) -> str:
        return f"{self.prefix}.in.{p}.t"

    def inbound(self, p: int, topic: str) -> str:
        """The subject the mapping gives a topic in partition ``p`` (for tests and benches)."""
        return f"{self.prefix}.in.{p}.m.{topic_to_subject(topic)}"

    def command(self, topic: str) -> str:
        """The subject the mapping gives a message on the planned-work command topic."""
        return f"{self.prefix}.in.c.m.{topic_to_subject(topic)}"

    def all_commands(self) -> str:
        return f"{self.prefix}.in.c.>"

    def alert(self, model: str) -> str:
        return f"{self.prefix}.alerts.{model}"

    def all_alerts(self) -> str:
        return f"{self.prefix}.alerts.>"

    def dead(self, p: int) -> str:
        return f"{self.prefix}.dead.{p}"

    def all_dead(self) -> str:
        return f"{self.prefix}.dead.>"

    def split(self, subject: str) -> tuple[int, str | None]:
        """``(partition, MQTT topic)`` of an inbound subject; topic None for a tick, partition COMMANDS for a command.

        >>> Subjects("wd", 4).split("wd.in.2.m.plant.a.pred"), Subjects("wd", 4).split("wd.in.c.m.x.y")
        ((2, 'plant/a/pred'), (-1, 'x/y'))
        """
        parts = subject.split(".", 4)
        p = COMMANDS if parts[2] == "c" else int(parts[2])
        if parts[3] == "t":
            return p, None
        return p, subject_to_topic(parts[4])


def _model_token(m: ModelSettings, flt: str) -> int:
    """The index (0-based) of the level of ``flt`` that holds the model id."""
    levels = flt.split("/")
    if m.model_level is not None:
        return m.model_level - 1
    hits = [i for i, lv in enumerate(levels) if lv == m.id]
    if len(hits) != 1:
        raise ConfigError(
            f"models[{m.id}]: topic {flt!r} must hold the model id {m.id!r} as exactly one level for the "
            "JetStream workers (the server partitions on it); name the topics by model, e.g. 'plant/{id}/pred'"
        )
    return hits[0]


def mappings(cfg: Config, models: list[ModelSettings] | None = None) -> dict[str, str]:
    """The server's subject mappings: each model topic pattern to its partition subject.

    The level holding the model id becomes a wildcard and the partition is computed on it, so
    a model's predictions and truths land in the same partition. Pass the unexpanded models
    (with ``model_level``) or the expanded ones; both give the same patterns.
    """
    js = cfg.jetstream
    out: dict[str, str] = {}
    for m in models if models is not None else cfg.models:
        for flt in (m.prediction_topic, m.truth_topic):
            if "." in flt or " " in flt:
                raise ConfigError(
                    f"models[{m.id}]: topic {flt!r} holds '.' or ' ', which the NATS server's MQTT listener refuses"
                )
            if "#" in flt:
                raise ConfigError(f"models[{m.id}]: topic {flt!r}: '#' cannot be partitioned; name each level")
            k = _model_token(m, flt)
            levels = flt.split("/")
            levels[k] = "*"
            wild = [i for i, lv in enumerate(levels) if lv == "+" or lv == "*"]
            src = ".".join("*" if lv == "+" else lv for lv in levels)
            n = {i: j + 1 for j, i in enumerate(wild)}  # wildcard positions count from 1
            dest = ".".join(f"{{{{wildcard({n[i]})}}}}" if i in n else lv for i, lv in enumerate(levels))
            out[src] = f"{js.subject_prefix}.in.{{{{partition({js.partitions},{n[k]})}}}}.m.{dest}"
    topic = command_topic(cfg)
    if "." in topic or " " in topic or "+" in topic or "#" in topic:
        raise ConfigError(
            f"broker.topics.planned_work = {cfg.broker.topics.planned_work!r}: the command topic {topic!r} holds "
            "'.', ' ', '+' or '#', which the JetStream workers cannot map (agent.name is part of it)"
        )
    out[topic_to_subject(topic)] = Subjects(js.subject_prefix, js.partitions).command(topic)
    return out


def command_topic(cfg: Config) -> str:
    """The agent's planned-work command topic (as the monitor computes it)."""
    return cfg.broker.topics.planned_work.replace("{agent}", cfg.agent.name)


def server_config(cfg: Config, models: list[ModelSettings] | None = None) -> str:
    """The ``mappings`` block to put in the NATS server's config."""
    lines = ["mappings {"]
    for src, dest in mappings(cfg, models).items():
        lines.append(f'  "{src}": "{dest}"')
    lines.append("}")
    return "\n".join(lines) + "\n"


@dataclass(frozen=True, slots=True)
class Delivery:
    """What the reply subject of a JetStream message tells: stream sequence and stored time."""

    stream_seq: int
    timestamp_ns: int
    pending: int


def delivery(reply: str) -> Delivery:
    """Read ``$JS.ACK.<stream>.<consumer>.<delivered>.<sseq>.<cseq>.<ts>.<pending>`` (and the longer form).

    >>> delivery("$JS.ACK.IN.c1.1.5.5.1796220949484770624.10")
    Delivery(stream_seq=5, timestamp_ns=1796220949484770624, pending=10)
    """
    t = reply.split(".")
    if len(t) == 9:
        return Delivery(int(t[5]), int(t[7]), int(t[8]))
    # with a domain and an account hash: $JS.ACK.<domain>.<hash>.<stream>.<consumer>.<delivered>...
    return Delivery(int(t[7]), int(t[9]), int(t[10]))
