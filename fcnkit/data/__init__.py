"""Data: class tables, image and mask reading, dataset folders, training patches and synthetic scenes.

Import the modules directly (``fcnkit.data.imageio``, ``fcnkit.data.dataset``…); this package file stays
empty so importing one reader does not pull in torch or the scene generator.
"""
