"""The history pages: context, render, SVG charts, writing and the local server.

Code outside this package imports from here; the modules inside are free to move:
`build` (context from the store's facts), `context` (the context dataclasses), `paths`
(file names and page paths), `words` and `views` (what the templates show), `render`
(pages in memory), `svg_charts`, `write` (`build_site`) and `serve`.
"""

from monitor.pages.build import SiteInputs, build_site_context
from monitor.pages.context import DigestLink
from monitor.pages.paths import DIGEST_ARCHIVE_DIR, pair_page_path
from monitor.pages.serve import make_server, server_url
from monitor.pages.write import build_site

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
