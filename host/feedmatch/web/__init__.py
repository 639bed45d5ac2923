"""The live station page (`feedmatch serve`): aiohttp, server-sent events, no CDN."""
