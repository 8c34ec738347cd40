"""Alert delivery: the channels (:mod:`monitor.delivery.sinks`) and the outbox relay (:mod:`monitor.delivery.relay`)."""
