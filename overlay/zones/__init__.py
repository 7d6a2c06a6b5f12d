"""From a VER map to zones: the grid, contours, the zone record, plate outlines and depths, the mosaic."""
