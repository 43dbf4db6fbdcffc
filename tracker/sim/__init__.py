"""The invented market and the invented closed-loop day used by the demo and the tests.

Everything here is made up (symbols, venue, prices) and says so.
"""
