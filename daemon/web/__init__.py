"""The network service behind ``phasewatch serve``: JSON API, live view, browser interface.

One process owns the scope; :class:`daemon.web.station.Station` arbitrates between live
view, manual control, autofocus and time-lapses, and the aiohttp application built by
:func:`daemon.web.app.create_app` puts it on the network.
"""

API_VERSION = "v1"
API_PREFIX = f"/api/{API_VERSION}"
