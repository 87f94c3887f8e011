"""loopwright.procedure"""
