"""Getting samples in: the driver contract and registry (:mod:`.source`) and the
single-producer single-consumer frame ring (:mod:`.ring`). Drivers
(``livefilt.drivers``) build on this package only."""
