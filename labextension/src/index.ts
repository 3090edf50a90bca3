/**
 * The jobdesk JupyterLab extension: a "Job desk" sidebar over the server's REST API, job
 * details in the main area, snippets into notebooks, notifications when jobs finish, and the
 * browser half of the notebook card's "Abort job" button.
 */
import {
  ILayoutRestorer,
  JupyterFrontEnd,
  JupyterFrontEndPlugin
} from '@jupyterlab/application';
import {
  Clipboard,
  Dialog,
  InputDialog,
  MainAreaWidget,
  Notification,
  showDialog
} from '@jupyterlab/apputils';
import { INotebookTracker, NotebookActions } from '@jupyterlab/notebook';

import { JobDetails } from './details';
import { firstLine, formatDuration, formatRows } from './format';
import { jobdeskIcon } from './icon';
import { IJobRecord, JobDeskModel } from './model';
import { IPanelActions, JobDeskPanel } from './panel';
import servicesPlugin from './servicesplugin';

const PLUGIN_ID = 'jobdesk-labextension:sidebar';

/** Jobs that ran at least this long raise a notification when they finish (common practice, no source). */
const NOTIFY_AFTER_SECONDS = 10;

const plugin: JupyterFrontEndPlugin<void> = {
  id: PLUGIN_ID,
  description: 'A sidebar listing jobdesk query jobs, their phases, results and cache.',
  autoStart: true,
  optional: [ILayoutRestorer, INotebookTracker],
  activate: (
    app: JupyterFrontEnd,
    restorer: ILayoutRestorer | null,
    notebooks: INotebookTracker | null
  ) => {
    const model = new JobDeskModel();
    const openDetails = new Map<string, MainAreaWidget<JobDetails>>();

    const title = (job: IJobRecord) => job.label || firstLine(job.adql).slice(0, 60) || job.id;

    const actions: IPanelActions = {
      openDetails(job) {
        let widget = openDetails.get(job.id);
        if (!widget || widget.isDisposed) {
          const content = new JobDetails(model, actions, job.id, job);
          widget = new MainAreaWidget({ content });
          widget.id = content.id;
          widget.title.icon = jobdeskIcon;
          widget.title.label = content.title.label;
          content.title.changed.connect(() => (widget!.title.label = content.title.label));
          openDetails.set(job.id, widget);
          app.shell.add(widget, 'main');
        }
        app.shell.activateById(widget.id);
      },
      async insertSnippet(job) {
        const panel = notebooks?.currentWidget;
        if (!panel) {
          Notification.warning('Open a notebook first: the snippet goes below its active cell.', {
            autoClose: 5000
          });
          return;
        }
        try {
          const code = await model.snippet(job.id);
          NotebookActions.insertBelow(panel.content);
          panel.content.activeCell?.model.sharedModel.setSource(code.trimEnd());
          app.shell.activateById(panel.id);
        } catch (err) {
          Notification.error(`Could not get the snippet: ${(err as Error).message}`);
        }
      },
      async copySnippet(job) {
        try {
          Clipboard.copyToSystem(await model.snippet(job.id));
          Notification.info('Snippet copied.', { autoClose: 2000 });
        } catch (err) {
          Notification.error(`Could not get the snippet: ${(err as Error).message}`);
        }
      },
      async abort(job) {
        try {
          const after = await model.abort(job.id);
          Notification.info(`Aborted: ${title(after)}`, { autoClose: 4000 });
        } catch (err) {
          Notification.error(`Abort failed: ${(err as Error).message}`);
        }
      },
      async resend(job) {
        try {
          const fresh = await model.resend(job.id);
          Notification.info(`Sent again as a new job: ${title(fresh)}`, { autoClose: 4000 });
          actions.openDetails(fresh);
        } catch (err) {
          Notification.error(`Sending again failed: ${(err as Error).message}`);
        }
      },
      async editInNotebook(job) {
        const panel = notebooks?.currentWidget;
        if (!panel) {
          Notification.warning('Open a notebook first: the query goes below its active cell.', {
            autoClose: 5000
          });
          return;
        }
        try {
          const code = await model.queryCode(job.id);
          NotebookActions.insertBelow(panel.content);
          panel.content.activeCell?.model.sharedModel.setSource(code.trimEnd());
          app.shell.activateById(panel.id);
        } catch (err) {
          Notification.error(`Could not get the query: ${(err as Error).message}`);
        }
      },
      async pin(job) {
        try {
          await model.pin(job.id, true);
          Notification.info(`Pinned: ${title(job)} stays through every prune.`, { autoClose: 4000 });
        } catch (err) {
          Notification.error(`Pin failed: ${(err as Error).message}`);
        }
      },
      async exportResult(job) {
        const answer = await InputDialog.getText({
          title: 'Export the result with its provenance',
          label: 'File (relative to the server root; .fits .vot .parquet .csv)',
          text: `${job.id}.fits`
        });
        if (!answer.button.accept || !answer.value) {
          return;
        }
        try {
          const written = await model.exportTo(job.id, answer.value);
          Notification.success(`Exported: ${written.join(', ')}`, { autoClose: 6000 });
        } catch (err) {
          Notification.error(`Export failed: ${(err as Error).message}`);
        }
      },
      async editLabel(job) {
        const answer = await InputDialog.getText({
          title: 'Label',
          text: job.label || ''
        });
        if (!answer.button.accept) {
          return;
        }
        try {
          await model.setLabel(job.id, answer.value || '');
          openDetails.get(job.id)?.content.load();
        } catch (err) {
          Notification.error(`Label change failed: ${(err as Error).message}`);
        }
      },
      async forget(job) {
        const answer = await showDialog({
          title: 'Forget this job?',
          body:
            `“${title(job)}” leaves the index. The service job is not touched; ` +
            'a cached result stays until the cache is pruned.',
          buttons: [Dialog.cancelButton(), Dialog.warnButton({ label: 'Forget' })]
        });
        if (!answer.button.accept) {
          return;
        }
        try {
          await model.forget(job.id);
          openDetails.get(job.id)?.dispose();
        } catch (err) {
          Notification.error(`Forget failed: ${(err as Error).message}`);
        }
      }
    };

    const panel = new JobDeskPanel(model, actions);
    panel.title.icon = jobdeskIcon;
    panel.title.label = 'Job desk';
    app.shell.add(panel, 'left', { rank: 600 });
    if (restorer) {
      restorer.add(panel, 'jobdesk-sidebar');
    }

    model.finished.connect((_, job) => {
      const ran = (job.finished || Date.now() / 1000) - (job.started || job.created);
      if (ran < NOTIFY_AFTER_SECONDS && job.phase === 'COMPLETED') {
        return;
      }
      // The duration said is the service's own (startTime to endTime), when it gave one.
      const own = job.service_started && job.service_finished
        ? ` after ${formatDuration(job.service_finished - job.service_started)} on the service`
        : '';
      const words = `${title(job)} — ${job.phase.toLowerCase()}${own}` +
        (job.rows !== null && job.rows !== undefined ? `, ${formatRows(job.rows)}` : '');
      const options = {
        autoClose: 8000 as number | false,
        actions: [{ label: 'Details', callback: () => actions.openDetails(job) }]
      };
      if (job.phase === 'COMPLETED') {
        Notification.success(`Job finished: ${words}`, options);
      } else {
        Notification.warning(`Job ended: ${words}`, options);
      }
    });

    // The notebook card's "Abort job" button: the kernel is busy inside wait() and cannot receive
    // the click, so the browser aborts the job through the REST API (see jobdesk/progress.py).
    document.addEventListener(
      'click',
      event => {
        const target = (event.target as HTMLElement | null)?.closest?.('.jobdesk-cancel');
        const jobClass = target && Array.from(target.classList).find(c => c.startsWith('jobdesk-job-'));
        if (jobClass) {
          const id = jobClass.slice('jobdesk-job-'.length);
          model.abort(id).catch(err => Notification.error(`Abort failed: ${err.message}`));
        }
      },
      true
    );

    app.commands.addCommand('jobdesk:open', {
      label: 'Show the Job desk',
      icon: jobdeskIcon,
      execute: () => app.shell.activateById(panel.id)
    });

    void app.restored.then(() => model.start());
  }
};

export default [plugin, servicesPlugin];
