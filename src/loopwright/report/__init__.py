"""loopwright.report"""
