"""The bundled demo: a quality-control line that learns to sort photos of machined parts.

Run it with ``python -m pipeprobe.demo`` or :func:`run_demo`.

Demo
    run_demo, DemoResult
Photos
    generate_images
"""

from pipeprobe.demo.images import generate_images
from pipeprobe.demo.run import DemoResult, run_demo

__all__ = ["run_demo", "DemoResult", "generate_images"]
