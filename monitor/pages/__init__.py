"""The history pages: context, render, SVG charts, writing and the local server.

Code outside this package imports from here; the modules inside are free to move.
"""

from monitor.pages.build import SiteInputs, build_site_context
from monitor.pages.serve import make_server, server_url
from monitor.pages.site import DIGEST_ARCHIVE_DIR, DigestLink, build_site, pair_page_path

__all__ = [
    "DIGEST_ARCHIVE_DIR",
    "DigestLink",
    "SiteInputs",
    "build_site",
    "build_site_context",
    "make_server",
    "pair_page_path",
    "server_url",
]
