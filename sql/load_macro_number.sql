-- wb_number(v): the finite number a raw value holds (text with spaces allowed, or the number of a
-- column read typed), else NULL ('abc', '', 'inf', 'nan').
create or replace temp macro wb_number(v) as
    case when isfinite(try_cast(v as double)) then try_cast(v as double) end
