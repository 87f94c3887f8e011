"""loopwright.instruments"""
