"""twistrate.clients.vservo: visual servoing of a camera loop.

Pure numpy, no wire, no clock: camera model and projection (`camera`), rigid-motion helpers (`rigid`),
the point interaction matrix (`interaction`), the image- and position-based laws (`laws`),
camera-to-tool twists for a camera on the tool or fixed in the cell (`transforms`), the feature frame
and its gate (`features`), one servo step (`servo`), the convergence criterion and error log
(`errorlog`), a synthetic camera of our own invented cell (`synthetic`), the tool pose of the planned
`state` output (`toolpose`). Over the wire: the configuration (`config`), the features socket (`feed`)
and the live loop (`runner`) that `twistrate vservo` runs.
"""
