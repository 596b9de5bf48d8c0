-- Remove one wave's rows from a weighting table (inside the weighting transaction).
delete from {{ table|ident }} where wave = $wave
