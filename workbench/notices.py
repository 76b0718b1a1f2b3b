"""Texts the app, the quality sheet and the README must say alike."""

CAUTION = ("Lossy compression discards information. Where images are evidence, records or used for diagnosis, "
           "lossy storage may be restricted: follow local regulations and professional guidelines.")
