"""The JetStream workers: the same core run on partitions of a NATS JetStream stream."""
