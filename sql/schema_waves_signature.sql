-- Databases staged before the signature was recorded gain the column (NULL: restaged on the next run).
alter table waves add column if not exists spec_signature varchar
