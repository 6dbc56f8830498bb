"""The web console: read-only pages over an index, served by ``upwell watch`` and ``upwell serve``.

    request ──▶ service.api (routes, token, bounds) ──▶ console.views (one dict per page,
                                                        read through ``Index``)
                         ├──▶ JSON twin: the dict as it is
                         └──▶ console.render: the dict through an autoescaping template

``views`` builds what a page shows, as plain data; the JSON API returns that same data, so a page
never knows more than a script can ask for. ``render`` turns it into HTML (Jinja2, autoescape
on) and ``chart`` draws the history chart as SVG on the server. Every asset is in
``console/static`` and served by upwell; nothing on a page is fetched from elsewhere.
"""
