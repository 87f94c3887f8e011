"""loopwright.store"""
