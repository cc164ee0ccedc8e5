"""The application layer: typed settings, loading a file (and a moment of its growth), the
registry of measures, running them with shared intermediate results, and the summary
document. The faces (command line, batch, viewer, the Python API) sit on top of it."""
