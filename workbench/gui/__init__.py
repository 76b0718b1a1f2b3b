"""The desktop app: a thin PySide6 layer over the headless core (no codec logic here)."""
