"""Code that runs inside the sandboxed interpreter: confinement, the host loop, capture and collection.

Standard library only at import (numpy and the layout library are imported by job.py once
the child is confined), Python 3.8 and later. Loaded by start.py as a private package
under ``-I``; modules import each other relatively and never import latchwatch.
"""
