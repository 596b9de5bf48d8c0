-- The staged waves with their bookkeeping, in spec order.
select wave, position, label, fieldwork_start, fieldwork_end, source_file, sha256, row_count, staged_at
from waves
order by position, wave
