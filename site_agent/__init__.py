"""The site agent: scores local records with a frozen model and releases only disclosure-controlled counts.

It imports nothing from :mod:`federation` except :mod:`federation.protocol`.
"""
