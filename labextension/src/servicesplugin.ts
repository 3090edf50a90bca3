/**
 * A second sidebar, "TAP services": browse what the desk knows of each service and insert a
 * starter query (checked and estimated before it is submitted) into the active notebook.
 */
import { JupyterFrontEnd, JupyterFrontEndPlugin } from '@jupyterlab/application';
import { Notification } from '@jupyterlab/apputils';
import { INotebookTracker, NotebookActions } from '@jupyterlab/notebook';
import { tableRowsIcon } from '@jupyterlab/ui-components';

import { ServicesBrowser } from './servicesbrowser';
import { ServicesModel, starterQuery } from './servicesmodel';

const servicesPlugin: JupyterFrontEndPlugin<void> = {
  id: 'jobdesk-labextension:services',
  description: 'Browse the tables and columns of the TAP services jobdesk knows.',
  autoStart: true,
  optional: [INotebookTracker],
  activate: (app: JupyterFrontEnd, notebooks: INotebookTracker | null) => {
    const model = new ServicesModel();
    const browser = new ServicesBrowser(model, {
      insertQuery(table, columns) {
        const panel = notebooks?.currentWidget;
        if (!panel) {
          Notification.warning('Open a notebook first: the query goes below its active cell.', {
            autoClose: 5000
          });
          return;
        }
        NotebookActions.insertBelow(panel.content);
        panel.content.activeCell?.model.sharedModel.setSource(
          starterQuery(model.service, table, columns)
        );
        app.shell.activateById(panel.id);
      }
    });
    browser.title.icon = tableRowsIcon;
    browser.title.caption = 'TAP services';
    app.shell.add(browser, 'left', { rank: 610 });
  }
};

export default servicesPlugin;
