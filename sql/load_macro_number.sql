-- wb_number(text): the finite number a raw text value holds (spaces allowed), else NULL
-- ('abc', '', 'inf', 'nan').
create or replace temp macro wb_number(v) as
    case when isfinite(try_cast(v as double)) then try_cast(v as double) end
