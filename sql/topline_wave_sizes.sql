-- Respondents per staged wave (the denominator of each table's "no answer" row).
-- Bound: $waves VARCHAR[] (the spec's wave ids; waves staged but no longer declared are not shown).
select wave, count(*)::BIGINT as respondents
from responses
where wave in (select unnest($waves::VARCHAR[]))
group by wave
