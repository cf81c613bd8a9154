"""An example rig driver for ``autotune serve``: copy this folder and replace the instruments.

``instruments.py`` is a made-up instrument API (an electrode supply and a timing sequencer)
that stands in for a lab's own control-system libraries; ``driver.py`` is the driver a lab
writes around them; ``DRIVER.toml`` maps autotune's set-points to the instruments' channels.
"""
