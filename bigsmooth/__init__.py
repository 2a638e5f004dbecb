"""bigsmooth: nightly graph-Laplacian smoothing of model scores so that similar people get similar scores."""

__version__ = "0.1.0"
