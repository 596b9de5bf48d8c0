-- Forget the warnings recorded when a wave was staged before.
delete from problems where wave = $wave
