"""loopwright.dsp"""
