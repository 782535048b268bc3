"""plant-audit: batch audit of regulatory PID loops.

Stages (see DEVELOPERS.md): inventory -> loop models -> exact frequency-domain
evaluation -> time-domain figures -> proposals and ranking -> report model -> render.
"""

__version__ = "0.1.0"
