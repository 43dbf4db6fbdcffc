"""The pure core: problems, the solver, sessions, liquidity, the formulation, the engine.

Nothing here reads the clock, the network or the disk, and nothing imports the wire format
(pydantic), asyncio or MQTT; ``tests/test_layers.py`` holds every module to that.
"""
