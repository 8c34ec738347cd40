"""Alert channels, one module per config ``type``; see :mod:`monitor.delivery.sinks.base`."""
