"""Printers: loop IR to C99 and NumPy text, the jinja2 skeletons around it, and the derivation dumps."""
