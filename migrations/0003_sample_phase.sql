-- Where a stepwise loop was in its dwell at each tick: 'settling' or 'averaging'; NULL for
-- the dithering methods and for ticks that did not seek.
ALTER TABLE samples ADD COLUMN phase TEXT;
