"""The live daemon: show state + audio child link + control transports (OSC, web)."""
