-- Each constraint's value at each tick, as a JSON object {"<constraint>": value, ...} in
-- config order (null where the value was not known); NULL for loops without constraints.
ALTER TABLE samples ADD COLUMN constraints TEXT;
