"""Exports of the store for models, GIS and publishing."""

#: The export formats, in the order of the help page (harmonize.export.run.EXPORTERS has one
#: writer for each; kept here so that the command line lists them without loading the writers).
FORMATS = ("long", "wide", "grid", "gpkg", "dwca")
