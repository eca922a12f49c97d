"""Reference planes: path-loss tables and the one arithmetic between the DUT's planes and the
instruments' (source setting from tone power and input loss, analyzer reading to DUT output, and back).

May import only the top-level errors and units.
"""
