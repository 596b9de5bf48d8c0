-- Remove a wave's staged rows (inside the staging transaction, before inserting the new ones).
delete from responses where wave = $wave
