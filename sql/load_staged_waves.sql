-- The staged waves with their bookkeeping, in spec order.
-- Identifiers: signed (whether the table has spec_signature; databases staged before it read NULL).
select wave, position, label, fieldwork_start, fieldwork_end, source_file, sha256, row_count, staged_at,
    {{ "spec_signature" if signed else "cast(null as varchar) as spec_signature" }}
from waves
order by position, wave
