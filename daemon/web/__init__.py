"""The network service behind ``phasewatch serve``: JSON API, live view, browser interface.

One process owns the scope; :class:`daemon.station.Station` (the service, outside this
package) arbitrates between live view, manual control, autofocus and time-lapses, and
the aiohttp application built by :func:`daemon.web.app.create_app` puts it on the
network. This package holds only HTTP: routes, authentication, the OpenAPI document,
WebSocket events, metrics exposition, DNS-SD and systemd notification.
"""

API_VERSION = "v1"
API_PREFIX = f"/api/{API_VERSION}"
