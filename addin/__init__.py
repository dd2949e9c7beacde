"""Cell-function bridge and headless recalculation for layerwise."""
