"""The demo plant behind ``halfwatch demo`` / ``make demo``: an invented works, simulated end to end.

* :mod:`halfwatch_demo.plant`      the invented plant (areas, assets, points, routes) and its idempotent setup
* :mod:`halfwatch_demo.scenario`   what each machine does over time (the ground truth the simulator follows)
* :mod:`halfwatch_demo.schedule`   when readings are taken: online points hourly, route points weekly
* :mod:`halfwatch_demo.backfill`   90 days of history through the ingest service, the analysis and the alarms
* :mod:`halfwatch_demo.mailsink`   a local SMTP sink (aiosmtpd) that writes every message as an .eml file
* :mod:`halfwatch_demo.live`       simulated online sensors posting through the HTTP API with an API key
* :mod:`halfwatch_demo.run`        wires it all together: setup, backfill, server + worker, mail, sensors

Every reading the demo produces is invented by :mod:`analysis.simulate`; none is a measurement.
"""
