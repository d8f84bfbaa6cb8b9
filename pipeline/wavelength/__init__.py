"""wavelength"""
