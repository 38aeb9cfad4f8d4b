"""The watcher daemon: config, state store, intake of finished files, lots across files, the run loop."""
