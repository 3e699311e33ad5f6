"""The presentation layer: the HTML report, pictures of the tree, the notebook and terminal views.

Each view is its own module, imported on demand (matplotlib loads only when a picture is asked
for); this package's ``__init__`` imports nothing.
"""
