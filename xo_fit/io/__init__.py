"""The rim: files in (jobs, measurements, parts on hand, results) and out (results, CSVs, SPICE decks)."""
