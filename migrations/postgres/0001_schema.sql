-- placeholder until the schema lands (branch pg-infra)
SELECT 1;
