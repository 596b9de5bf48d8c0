-- Record (or replace) a staged wave's bookkeeping row.
insert or replace into waves
    (wave, position, label, fieldwork_start, fieldwork_end, source_file, sha256, row_count, staged_at, spec_signature)
values
    ($wave, $position, $label, $fieldwork_start, $fieldwork_end, $source_file, $sha256, $row_count, $staged_at,
     $spec_signature)
