"""The long-running service: Kafka in, bars out, metrics and health over HTTP."""
