-- wb_code(text): a raw text value in the form integer codes are compared in ('3.0' and '03' -> '3');
-- text that is not a whole number is returned unchanged.
create or replace temp macro wb_code(v) as
    case
        when wb_number(v) = trunc(wb_number(v)) and abs(wb_number(v)) < 1e15
            then cast(cast(wb_number(v) as bigint) as varchar)
        else v
    end
