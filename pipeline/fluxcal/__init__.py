"""fluxcal"""
