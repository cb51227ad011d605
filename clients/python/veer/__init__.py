"""veer's Python side: the bundle exporter and reader (veer.bundle), the independent NumPy
forward pass used as the reference in tests (veer.reference), random-weight bundles for tests
and benchmarks (veer.synth), and the service client (veer.client).

Submodules are imported on demand, so `import veer.client` does not pull in NumPy's exporter.
"""
__version__ = "0.1.0"
