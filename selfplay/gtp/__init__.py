"""GTP v2, the Go Text Protocol (https://www.lysator.liu.se/~gunnar/gtp/): a run's snapshot as an
engine (:mod:`selfplay.gtp.engine`) and any GTP engine as an opponent (:mod:`selfplay.gtp.client`)."""
