-- How many rows a wave has staged now.
select count(*) from responses where wave = $wave
