"""Demo night of an invented long-slit spectrograph, generated from first principles.

The scenario is invented: Tarn Ridge Observatory, its 1.8-m telescope and the
Ridgeline Long-Slit Spectrograph (RLS). :mod:`demo_data.simulate` makes raw
frames and their truth; it never imports the reduction pipeline. See
demo_data/README.md.
"""
