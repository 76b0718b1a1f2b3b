"""File formats: the chunked container and the bundle, basis and model files built on it;
image files in and out, and the names images travel under."""
