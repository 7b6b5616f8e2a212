"""The history pages: context, render, SVG charts, writing and the local server."""
