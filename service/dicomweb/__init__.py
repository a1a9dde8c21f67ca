"""DICOMweb (PS3.18) through dicomweb-client: the HTTP session of a configured peer, and
STOW-RS delivery of results."""
