/**
 * The estimate measured before a job was sent (`submit(..., estimate=True)` stores it in the
 * record), in words for the job list and the details.
 */
import { IJobRecord } from './model';
import { formatBytes } from './format';

interface IEstimate {
  rows?: number | null;
  rows_exact?: boolean;
  bytes?: number | null;
  over_maxrec?: boolean | null;
  duration_text?: string;
}

/** "≈ 1,996 rows, 158.4 kB, 2 s to 1 min", or '' when the job carries no estimate. */
export function estimateText(job: IJobRecord): string {
  const est = job.estimate as IEstimate | null | undefined;
  if (!est || est.rows === null || est.rows === undefined) {
    return '';
  }
  const rows = `${est.rows_exact === false ? '≥' : '≈'} ${est.rows.toLocaleString('en-US')} rows`;
  const parts = [rows];
  if (est.bytes !== null && est.bytes !== undefined) {
    parts.push(formatBytes(est.bytes));
  }
  if (est.duration_text && est.duration_text !== 'unknown') {
    parts.push(est.duration_text);
  }
  if (est.over_maxrec) {
    parts.push('over MAXREC');
  }
  return parts.join(', ');
}

/** The row count to show in the list: the real one, else the estimate while the job runs. */
export function rowsOrEstimate(job: IJobRecord, real: string): string {
  if (real) {
    return real;
  }
  const est = estimateText(job);
  return est ? est.split(', ')[0] : '';
}
