"""Reference planes: path-loss tables and the one arithmetic between the DUT's planes and the
instruments' (source setting from tone power and input loss, analyzer reading to DUT output, and back).

loss_table.py interpolates a path's loss; arithmetic.py moves a power across a path, both ways;
referral.py applies it to a point's columns (at measurement time and when re-referring a run).
May import only the top-level errors and units (and numpy).
"""
