"""Preview before publishing: stage a cycle, send each unit its confidential preview, record
sign-off, then promote exactly the reviewed build to the public output.

``stage.py`` builds the staging folder, ``ledger.py`` lists each unit's records, ``previews.py``
writes the unit previews and proves none of them reaches the site, ``review.py`` writes the review
summary, ``promote.py`` hashes, signs off and promotes.
"""
