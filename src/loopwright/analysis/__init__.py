"""loopwright.analysis"""
