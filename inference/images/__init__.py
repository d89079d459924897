"""Images: reading and writing files, large-TIFF streaming, the working range and value transforms."""
