"""The bus room: everything barsmith knows about talking to Kafka, in one place.

Sources, sinks, the service and the tools import from here; nothing here imports
them. aiokafka itself is imported only when a client is made, so importing this
package costs nothing.

* :mod:`barsmith.bus.clients` — the security settings as client arguments, the
  producer, consumer and admin factories, and which failures are the bus's own;
* :mod:`barsmith.bus.topics` — stream names, which partition a key goes to, topic
  creation;
* :mod:`barsmith.bus.checkpoints` — per-partition transactions and the compacted
  state topic that exactly-once delivery commits checkpoints to.
"""

from barsmith.bus.checkpoints import (
    STATE_TOPIC_CONFIGS,
    CheckpointBus,
    KafkaCheckpointBus,
    KafkaTransaction,
    MemoryCheckpointBus,
    PartitionTransaction,
)
from barsmith.bus.clients import (
    bar_producer,
    client_kwargs,
    is_bus_failure,
    is_fenced,
    new_admin,
    new_consumer,
    new_producer,
    start_client,
)
from barsmith.bus.topics import ensure_topic, partition_for, stream_name, symbol_of, topic_partitions

__all__ = [
    "STATE_TOPIC_CONFIGS",
    "CheckpointBus",
    "KafkaCheckpointBus",
    "KafkaTransaction",
    "MemoryCheckpointBus",
    "PartitionTransaction",
    "bar_producer",
    "client_kwargs",
    "ensure_topic",
    "is_bus_failure",
    "is_fenced",
    "new_admin",
    "new_consumer",
    "new_producer",
    "partition_for",
    "start_client",
    "stream_name",
    "symbol_of",
    "topic_partitions",
]
