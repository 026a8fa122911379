"""The Kafka daemon: thin adapters around the pure engine (consumer, producer, state, health)."""
