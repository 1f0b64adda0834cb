"""The browser view: a small HTTP + WebSocket server that relays a service's stream to web pages.

:mod:`.settings` (what to listen on, TLS, tokens; no aiohttp needed),
:mod:`.feed` (what one browser is still to be sent, bounded), :mod:`.server`
(the aiohttp application; needs the ``web`` extra), ``static/`` (the page).
"""
