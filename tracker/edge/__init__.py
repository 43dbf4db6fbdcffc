"""The edge: bytes to validated messages and back (the wire contract), recordings, and the
intake that admits every inbound record to the engine, live or replayed.
"""
