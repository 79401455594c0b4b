"""Importers: RGB-D layouts people already have -> capture folders (protomine.capture/1)."""
