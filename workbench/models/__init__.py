"""The shipped conv model (``default.wmodel``) and the script that trains it."""
