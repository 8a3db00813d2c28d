"""Bundled demo forest (Brennick Hollow Forest, an invented forest); see make_demo.py."""
