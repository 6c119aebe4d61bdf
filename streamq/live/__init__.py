"""Live operation: device I/O through sounddevice (PortAudio), the live runner."""
